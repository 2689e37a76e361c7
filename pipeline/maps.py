"""Compose the HTML maps from stage artefacts (layers, styles, popups, cautions).

The drawing itself is :mod:`pipeline.webmap`; this module decides what each map shows.
"""

from __future__ import annotations

from typing import Any

import geopandas as gpd
import numpy as np

from pipeline.cautions import CAUTIONS
from pipeline.hillshade import Basemap
from pipeline.webmap import (
    OKABE_ITO_NAMED,
    CategoryStyle,
    MapLayer,
    MapSpec,
    RampStyle,
    build_map_html,
)

__all__ = ["VERDICT_STYLE", "ZONE_COLORS", "station_map_spec", "station_map_html", "basemap_of"]

#: Verdict colours (Okabe–Ito) and plain labels for the legend.
VERDICT_STYLE = CategoryStyle(
    column="verdict",
    colors={
        "meets_rule_and_justified": OKABE_ITO_NAMED["bluish_green"],
        "permitted_not_justified": OKABE_ITO_NAMED["orange"],
        "not_permitted": OKABE_ITO_NAMED["vermillion"],
        "failed_field_test": OKABE_ITO_NAMED["reddish_purple"],
        "not_assessed": "#9e9e9e",
    },
    labels={
        "meets_rule_and_justified": "Meets rule, fleet-justified",
        "permitted_not_justified": "Permitted, not fleet-justified",
        "not_permitted": "Not permitted by the rule",
        "failed_field_test": "Failed field test",
        "not_assessed": "Not assessed",
    },
)

#: Sequential colours for justified-AKI bands, low → high (ColorBrewer YlGnBu, a sequential
#: scheme marked colour-blind safe by Brewer; hex values from memory).
ZONE_COLORS = ("#ffffcc", "#a1dab4", "#41b6c4", "#2c7fb8", "#253494")

STATION_POPUP = (
    ("station_id", "Station id"),
    ("operator", "Operator"),
    ("elevation_m", "Elevation [m]"),
    ("pressure_kpa", "Barometric pressure [kPa]"),
    ("design_temperature_c", "Design-day temperature [°C]"),
    ("regular_aki", "Regular posted [AKI]"),
    ("justified_aki", "Justified minimum [AKI]"),
    ("justified_aki_p05", "Justified, 5 % bound [AKI]"),
    ("justified_aki_p95", "Justified, 95 % bound [AKI]"),
    ("regular_share_satisfied_pct", "Fleet satisfied by regular [%]"),
    ("regular_break_even_elevation_m", "Regular break-even elevation [m]"),
    ("fleet_zone", "Fleet zone"),
    ("export_risk_l_aki_per_month", "Descent-corridor risk [L·AKI/month]"),
    ("fuel_share_in_deficit", "Share of its fuel driven in deficit [0–1]"),
    ("corridor_required_aki", "AKI its corridors need [AKI]"),
    ("verdict_reason", "Verdict"),
)

#: Colour-blind-safe sequential ramp for corridor risk (matplotlib magma, reversed; light → dark).
RISK_COLORS = ("#fec287", "#f1605d", "#b5367a", "#3b0f70")


def corridor_layer(corridors: gpd.GeoDataFrame) -> MapLayer | None:
    """Corridors drawn by risk: width and a colour ramp by ``risk_l_aki_per_month``."""
    if corridors is None or not len(corridors):
        return None
    risk = corridors["risk_l_aki_per_month"].to_numpy(float)
    pos = risk[risk > 0]
    if pos.size >= 3:
        b = np.unique(np.round(np.quantile(pos, [0.5, 0.8, 0.95]), -1))
        breaks = tuple(float(x) for x in b if x > 0) or (1.0,)
    else:
        breaks = (1.0,)
    colors = (
        RISK_COLORS[-(len(breaks) + 1) :] if len(breaks) + 1 <= len(RISK_COLORS) else RISK_COLORS
    )
    return MapLayer(
        name="Descent corridors (risk)",
        gdf=corridors,
        style=RampStyle(
            column="risk_l_aki_per_month",
            breaks=breaks,
            colors=tuple(colors),
            width_range=(2.0, 8.0),
            label_fmt="{:,.0f}",
            unit="L·AKI/month",
        ),
        popup_fields=_present(
            corridors,
            (
                ("risk_l_aki_per_month", "Risk [L·AKI/month]"),
                ("flow_l_per_month", "Sub-standard fuel carried [L/month]"),
                ("deficit_aki", "Requirement deficit [AKI]"),
                ("required_aki", "Fleet requirement here [AKI]"),
                ("direction", "Direction of the flow"),
                ("sources_count", "Source stations"),
                ("length_m", "Length [m]"),
            ),
        ),
    )


def basemap_of(terrain_artefacts: dict[str, Any]) -> Basemap | None:
    png = terrain_artefacts.get("basemap_png")
    bounds = terrain_artefacts.get("basemap_bounds")
    if png is None or bounds is None:
        return None
    (s, w), (n, e) = bounds["bounds"]
    return Basemap(png_bytes=png, bounds_latlon=((s, w), (n, e)))


def _zone_style(zones: gpd.GeoDataFrame) -> CategoryStyle:
    labels = list(dict.fromkeys(zones.sort_values("band_index")["band_label"]))
    n_all = (
        int(zones["band_count"].iloc[0])
        if "band_count" in zones.columns and len(zones)
        else len(labels)
    )
    colors_all = _spread(ZONE_COLORS, n_all)
    by_label = {}
    for _, r in zones.sort_values("band_index").iterrows():
        by_label[str(r["band_label"])] = colors_all[int(r["band_index"])]
    return CategoryStyle(
        column="band_label", colors=by_label, labels={k: f"{k} AKI" for k in by_label}
    )


def _spread(colors: tuple[str, ...], n: int) -> list[str]:
    if n <= len(colors):
        idx = np.round(np.linspace(0, len(colors) - 1, n)).astype(int)
        return [colors[i] for i in idx]
    return [colors[min(i, len(colors) - 1)] for i in range(n)]


def _present(gdf: gpd.GeoDataFrame, fields) -> tuple[tuple[str, str], ...]:
    return tuple((c, label) for c, label in fields if c in gdf.columns)


def station_map_spec(
    stations: gpd.GeoDataFrame,
    *,
    zones: gpd.GeoDataFrame | None,
    roads: gpd.GeoDataFrame | None,
    corridors: gpd.GeoDataFrame | None = None,
    towns: gpd.GeoDataFrame | None,
    rejected: gpd.GeoDataFrame | None,
    basemap: Basemap | None,
    title: str,
    subtitle: str,
    generated_note: str = "",
) -> MapSpec:
    """The stations map: justified-AKI zones, roads, towns, corridors, stations by verdict."""
    layers: list[MapLayer] = []
    if zones is not None and len(zones):
        layers.append(
            MapLayer(
                name="Justified minimum AKI zones",
                gdf=zones,
                style=_zone_style(zones),
                popup_fields=_present(
                    zones, (("band_label", "Justified minimum [AKI]"), ("area_km2", "Area [km²]"))
                ),
                tooltip_field="band_label",
                fill_opacity=0.35,
            )
        )
    if roads is not None and len(roads):
        style = None
        if "aadt" in roads.columns:
            style = RampStyle(
                column="aadt",
                breaks=(1000.0, 5000.0),
                colors=("#8c8c8c", "#555555", "#222222"),
                width_range=(1.5, 4.5),
                label_fmt="{:,.0f}",
                unit="veh/day",
            )
        layers.append(
            MapLayer(
                name="Roads",
                gdf=roads,
                style=style,
                popup_fields=_present(
                    roads, (("road_class", "Class"), ("aadt", "Traffic [veh/day]"))
                ),
                visible=True,
            )
        )
    if towns is not None and len(towns):
        layers.append(
            MapLayer(
                name="Towns",
                gdf=towns,
                popup_fields=_present(towns, (("population", "Population"),)),
                tooltip_field="name" if "name" in towns.columns else None,
                point_radius_px=4,
                visible=False,
                searchable_fields=("name",) if "name" in towns.columns else (),
            )
        )
    cl = corridor_layer(corridors)
    if cl is not None:
        layers.append(cl)
    st_style = VERDICT_STYLE if "verdict" in stations.columns else None
    layers.append(
        MapLayer(
            name="Stations",
            gdf=stations,
            style=st_style,
            popup_fields=_present(stations, STATION_POPUP),
            tooltip_field="name",
            searchable_fields=tuple(c for c in ("station_id", "name") if c in stations.columns),
            point_radius_px=6,
        )
    )
    if rejected is not None and len(rejected) and rejected.geometry.notna().any():
        rj = rejected[rejected.geometry.notna()]
        layers.append(
            MapLayer(
                name="Rejected rows",
                gdf=rj,
                popup_fields=_present(
                    rj,
                    (
                        ("station_id", "Station id"),
                        ("source_row", "Row in input"),
                        ("reject_reason", "Why rejected"),
                    ),
                ),
                tooltip_field="name" if "name" in rj.columns else None,
                visible=False,
                point_radius_px=5,
            )
        )
    return MapSpec(
        title=title,
        subtitle=subtitle,
        layers=layers,
        cautions=CAUTIONS,
        basemap=basemap,
        generated_note=generated_note,
        legend_title="Legend",
    )


def station_map_html(ctx, up: dict[str, dict[str, Any]], stations, zones, rejected) -> str:
    """Build the stations map for a run from its stage artefacts and optional inputs."""
    from pipeline import io

    cfg = ctx.config
    roads = io.read_vector(cfg.inputs.roads, what="roads") if cfg.inputs.roads else None
    towns = io.read_vector(cfg.inputs.towns, what="towns") if cfg.inputs.towns else None
    spec = station_map_spec(
        stations,
        zones=zones,
        roads=roads,
        towns=towns,
        rejected=rejected,
        corridors=up.get("corridors", {}).get("corridors"),
        basemap=basemap_of(up.get("terrain", {})),
        title=f"Minimum gasoline AKI by station — {cfg.name}",
        subtitle="Elevation, barometric pressure, justified minimum AKI and verdicts",
        generated_note=f"Run date {ctx.today.isoformat()} · altigrade",
    )
    return build_map_html(spec)
