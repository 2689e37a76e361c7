"""Compose the HTML maps from stage artefacts (layers, styles, popups, cautions).

The drawing itself is :mod:`pipeline.webmap`; this module decides what each map shows.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import geopandas as gpd
import numpy as np

from pipeline.cautions import CAUTIONS
from pipeline.hillshade import Basemap
from pipeline.io import top_positions
from pipeline.webmap import (
    OKABE_ITO_NAMED,
    CategoryStyle,
    MapLayer,
    MapSpec,
    RampStyle,
    in_map_crs,
)

__all__ = [
    "VERDICT_STYLE",
    "ZONE_COLORS",
    "audience_maps",
    "read_map_inputs",
    "basemap_of",
    "busiest",
    "station_map_spec",
]

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


def town_layer(towns: gpd.GeoDataFrame, visible: bool) -> MapLayer:
    """Towns as small dark-grey points, searchable by name."""
    t = towns.assign(place_kind="town")
    return MapLayer(
        name="Towns",
        gdf=t,
        style=CategoryStyle(
            column="place_kind", colors={"town": "#3d3d3d"}, labels={"town": "Town"}
        ),
        popup_fields=_present(t, (("population", "Population"),)),
        tooltip_field="name" if "name" in t.columns else None,
        point_radius_px=4,
        visible=visible,
        searchable_fields=("name",) if "name" in t.columns else (),
    )


ROAD_RANK = ("aadt",)  # the roads a map keeps when it cannot draw them all: the busiest


def busiest(
    gdf: gpd.GeoDataFrame | None, budget: int, by: tuple[str, ...]
) -> tuple[gpd.GeoDataFrame | None, int]:
    """At most ``budget`` rows of ``gdf``: the largest by the ``by`` columns (those present,
    in turn; ties kept in input order), in input order. Returns (rows, total rows).

    A browser map cannot draw a whole state's road network; the GeoPackage keeps every row."""
    if gdf is None:
        return None, 0
    total = len(gdf)
    if total <= budget:
        return gdf, total
    return gdf.iloc[top_positions(gdf, budget, by)], total


def _shown(name: str, short: str, gdf: gpd.GeoDataFrame, total: int, what: str) -> str:
    """The layer label: ``name``, or ``short`` with how many of how many it shows."""
    return name if len(gdf) >= total else f"{short} ({what} {len(gdf):,} of {total:,})"


def road_layer(roads: gpd.GeoDataFrame, total: int | None = None) -> MapLayer:
    """Roads in greys, wider with traffic where the layer gives it (``total``: rows before
    :func:`busiest` thinned them, named in the layer label)."""
    style = None
    if "aadt" in roads.columns:
        style = RampStyle(
            column="aadt",
            breaks=(1000.0, 5000.0),
            colors=("#9a9a9a", "#6b6b6b", "#3d3d3d"),
            width_range=(1.5, 4.0),
            label_fmt="{:,.0f}",
            unit="veh/day",
        )
    else:
        roads = roads.assign(road_kind="road")
        style = CategoryStyle(
            column="road_kind", colors={"road": "#6b6b6b"}, labels={"road": "Road"}
        )
    return MapLayer(
        name=_shown("Roads", "Roads", roads, total or len(roads), "busiest"),
        gdf=roads,
        style=style,
        popup_fields=_present(roads, (("road_class", "Class"), ("aadt", "Traffic [veh/day]"))),
    )


def corridor_layer(corridors: gpd.GeoDataFrame, total: int | None = None) -> MapLayer | None:
    """Corridors drawn by risk: width and a colour ramp by ``risk_l_aki_per_month``
    (``total``: rows before :func:`busiest` thinned them, named in the layer label)."""
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
        name=_shown(
            "Descent corridors (risk)", "Corridors", corridors, total or len(corridors), "riskiest"
        ),
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


def basemap_of(artefacts: dict[str, Any]) -> Basemap | None:
    """The basemap stage's PNG and bounds as a :class:`Basemap` (None when absent)."""
    png = artefacts.get("basemap_png")
    bounds = artefacts.get("basemap_bounds")
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
    station_popup: Sequence[tuple[str, str]] = STATION_POPUP,
    road_total: int | None = None,
    corridor_total: int | None = None,
) -> MapSpec:
    """The stations map: justified-AKI zones, roads, towns, corridors, stations by verdict
    (``*_total``: rows before :func:`busiest` thinned a layer)."""
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
        layers.append(road_layer(roads, road_total))
    if towns is not None and len(towns):
        layers.append(town_layer(towns, visible=False))
    cl = corridor_layer(corridors, corridor_total)
    if cl is not None:
        layers.append(cl)
    st_style = VERDICT_STYLE if "verdict" in stations.columns else None
    layers.append(_station_layer(stations, st_style, station_popup))
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


CHANGE_STYLE = CategoryStyle(
    column="regular_change",
    colors={
        "raise": OKABE_ITO_NAMED["vermillion"],
        "keep": OKABE_ITO_NAMED["bluish_green"],
        "may lower": OKABE_ITO_NAMED["sky_blue"],
        "not_assessed": "#9e9e9e",
    },
    labels={
        "raise": "Raise the regular grade",
        "keep": "Keep today's regular",
        "may lower": "Could go lower (information only)",
        "not_assessed": "Not assessed",
    },
)

GRADE_STYLE = CategoryStyle(
    column="regular_grade_label",
    colors={
        "85": OKABE_ITO_NAMED["orange"],
        "86": OKABE_ITO_NAMED["yellow"],
        "87 or higher": OKABE_ITO_NAMED["blue"],
    },
    labels={
        "85": "Regular sold as 85 AKI",
        "86": "Regular sold as 86 AKI",
        "87 or higher": "Regular sold as 87 AKI or higher",
    },
)

PLAN_POPUP = (
    ("station_id", "Station id"),
    ("operator", "Operator"),
    ("elevation_m", "Elevation [m]"),
    ("regular_aki", "Regular today [AKI]"),
    ("recommended_regular_aki", "Recommended regular [AKI]"),
    ("recommendation_driver", "Set by"),
    ("volume_l_per_month", "Volume, all grades [L/month]"),
    ("incremental_cost_usd_per_month", "Extra cost [USD/month]"),
    ("fleet_zone", "Supply area / fleet zone"),
    ("supply_reason", "Why"),
)

PUBLIC_POPUP = (
    ("public_sold", "What is sold here"),
    ("elevation_m", "Elevation [m]"),
    ("public_suits", "Which vehicles it suits here"),
    ("public_driving_down", "Driving down or towing?"),
)

REGULATOR_POPUP = STATION_POPUP[:-1] + (
    ("priority_rank", "Inspection priority rank"),
    ("priority_score", "Priority score [0–100]"),
    ("priority_reason", "Why this priority"),
    ("planned_day", "Planned inspection day"),
    ("verdict_reason", "Verdict"),
)


def _fmt_num(v: float, unit: str = "") -> str:
    return f"{v:,.0f}{unit}" if np.isfinite(v) else "—"


def public_texts(stations: gpd.GeoDataFrame, standard_aki: float = 87.0) -> gpd.GeoDataFrame:
    """Plain-language columns for the public map: what is sold, which vehicles it suits at this
    elevation, what to do when driving down. No enforcement detail."""
    st = stations.copy()
    reg = st["regular_aki"].to_numpy(float)
    others = [
        (label, st[col].to_numpy(float))
        for col, label in (("midgrade_aki", "mid-grade"), ("premium_aki", "premium"))
        if col in st.columns
    ]
    grades = []
    for i in range(len(st)):
        parts = [f"regular {reg[i]:g} AKI"]
        parts += [f"{label} {aki[i]:g}" for label, aki in others if np.isfinite(aki[i])]
        grades.append(", ".join(parts))
    st["public_sold"] = grades
    share = (
        st["regular_share_satisfied_pct"].to_numpy(float)
        if "regular_share_satisfied_pct" in st
        else np.full(len(st), np.nan)
    )
    suits = []
    down = []
    be = (
        st["regular_break_even_elevation_m"].to_numpy(float)
        if "regular_break_even_elevation_m" in st
        else np.full(len(st), np.nan)
    )
    for i in range(len(st)):
        g = reg[i]
        s_txt = (
            f"About {share[i]:.0f} in 100 vehicles on the road here run well on this regular "
            "at this elevation. "
            if np.isfinite(share[i])
            else ""
        )
        if g < standard_aki:
            s_txt += (
                "Older engines gain most from the thin air; modern and turbocharged engines "
                "gain little or nothing — use the grade your owner's manual names."
            )
            d_txt = (
                f"This {g:g} is sold for high ground. Before a long descent to lower ground, "
                "towing, or a loaded climb, fill with 87 or the grade your manual names"
            )
            d_txt += (
                f"; below about {_fmt_num(be[i], ' m')} this grade no longer suits most vehicles."
                if np.isfinite(be[i])
                else "."
            )
        else:
            s_txt += "This is the usual sea-level regular grade; follow your owner's manual."
            d_txt = "Regular here is the sea-level grade: no change needed when you drive down."
        suits.append(s_txt)
        down.append(d_txt)
    st["public_suits"] = suits
    st["public_driving_down"] = down
    st["regular_grade_label"] = np.where(
        reg >= standard_aki, "87 or higher", np.where(reg >= 86, "86", "85")
    )
    return st


def read_map_inputs(cfg) -> dict[str, Any]:
    """What the maps draw besides the run's results, read from its inputs: ``roads`` (the
    busiest ``outputs.map_max_lines`` lines, or None), ``road_total`` (road rows in the
    file), ``towns`` and ``fleet_zones`` (None where the config names no such file); the
    layers already in the maps' CRS (:func:`pipeline.webmap.in_map_crs`), so that each map
    showing them does not reproject them again."""
    from pipeline import io

    roads, road_total = (
        io.read_vector_top(
            cfg.inputs.roads, what="roads", budget=cfg.outputs.map_max_lines, by=ROAD_RANK
        )
        if cfg.inputs.roads
        else (None, 0)
    )
    towns = io.read_vector(cfg.inputs.towns, what="towns") if cfg.inputs.towns else None
    fleet_zones = (
        io.read_vector(cfg.inputs.fleet_zones, what="fleet zones")
        if cfg.inputs.fleet_zones
        else None
    )
    return {
        "roads": in_map_crs(roads),
        "road_total": int(road_total),
        "towns": in_map_crs(towns),
        "fleet_zones": in_map_crs(fleet_zones),
    }


def _station_layer(stations, style, popup, name="Stations") -> MapLayer:
    return MapLayer(
        name=name,
        gdf=stations,
        style=style,
        popup_fields=_present(stations, popup),
        tooltip_field="name",
        point_radius_px=6,
        searchable_fields=tuple(c for c in ("station_id", "name") if c in stations.columns),
    )


def audience_maps(
    ctx, up: dict[str, dict[str, Any]], stations, zones, rejected
) -> dict[str, MapSpec]:
    """The three maps: ``map.html`` (regulators), ``map_distributor.html``,
    ``map_public.html``, as specs for :func:`pipeline.webmap.build_map_html` (one builder,
    one look, cautions on each); the caller renders them, in parallel where it can. The
    inputs they draw come from ``up["map_inputs"]`` (:func:`read_map_inputs`), read here when
    no stage read them."""
    cfg = ctx.config
    inputs = up.get("map_inputs") or read_map_inputs(cfg)
    roads, road_total = inputs["roads"], inputs["road_total"]
    towns, fleet_zones = inputs["towns"], inputs["fleet_zones"]
    corridors = up.get("corridors", {}).get("corridors")
    budget = cfg.outputs.map_max_lines
    corridors, corridor_total = busiest(
        corridors, budget, ("risk_l_aki_per_month", "flow_l_per_month")
    )
    corridors, zones = in_map_crs(corridors), in_map_crs(zones)  # once for every map
    plans = up.get("plans", {})
    basemap = basemap_of(up.get("basemap", {}))
    note = f"Run date {ctx.today.isoformat()} · altigrade"
    maps: dict[str, MapSpec] = {}

    # regulators
    reg = station_map_spec(
        stations,
        zones=zones,
        roads=roads,
        towns=towns,
        rejected=rejected,
        corridors=corridors,
        road_total=road_total,
        corridor_total=corridor_total,
        basemap=basemap,
        title=f"Inspection planning map — {cfg.name}",
        subtitle="Verdicts, justified-AKI zones, descent corridors, priorities "
        "and next inspection routes",
        generated_note=note,
        station_popup=REGULATOR_POPUP,
    )
    layers = list(reg.layers)
    routes = plans.get("inspection_routes")
    if isinstance(routes, gpd.GeoDataFrame) and len(routes):
        routes = routes.assign(day_label=[f"day {int(d)}" for d in routes["day"]])
        day_colors = {
            f"day {d}": c
            for d, c in zip(
                sorted({int(x) for x in routes["day"]}),
                ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000") * 10,
                strict=False,
            )
        }
        layers.insert(
            len(layers) - 2,
            MapLayer(
                name="Inspection routes",
                gdf=routes,
                visible=False,
                style=CategoryStyle(column="day_label", colors=day_colors),
                popup_fields=_present(
                    routes,
                    (
                        ("day", "Day"),
                        ("base_id", "Base"),
                        ("n_stops", "Stops"),
                        ("length_km", "Length [km]"),
                    ),
                ),
            ),
        )
    bases = plans.get("inspection_bases")
    if isinstance(bases, gpd.GeoDataFrame) and len(bases):
        layers.insert(
            len(layers) - 1,
            MapLayer(
                name="Inspector bases",
                gdf=bases,
                popup_fields=_present(bases, (("base_id", "Base"),)),
                tooltip_field="name",
                point_radius_px=8,
            ),
        )
    maps["map.html"] = MapSpec(
        title=reg.title,
        subtitle=reg.subtitle,
        layers=layers,
        cautions=CAUTIONS,
        basemap=basemap,
        generated_note=note,
    )

    # distributors
    if "regular_change" in stations.columns:
        sp = plans.get("supply_plan")
        st = stations
        if isinstance(sp, gpd.GeoDataFrame) and "reason" in sp.columns:
            st = stations.assign(
                supply_reason=stations["station_id"].map(sp.set_index("station_id")["reason"])
            )
        dl: list[MapLayer] = []
        if fleet_zones is not None:
            dl.append(
                MapLayer(
                    name="Supply areas (fleet zones)",
                    gdf=fleet_zones,
                    popup_fields=_present(fleet_zones, (("zone_name", "Area"),)),
                    tooltip_field="zone_name" if "zone_name" in fleet_zones else None,
                    fill_opacity=0.08,
                )
            )
        if roads is not None:
            dl.append(road_layer(roads, road_total))
        cl = corridor_layer(corridors, corridor_total)
        if cl is not None:
            dl.append(cl)
        dl.append(_station_layer(st, CHANGE_STYLE, PLAN_POPUP))
        maps["map_distributor.html"] = MapSpec(
            title=f"Grade-supply plan — {cfg.name}",
            subtitle="Which stations need which regular grade, why, and what it costs",
            layers=dl,
            cautions=CAUTIONS,
            basemap=basemap,
            generated_note=note,
        )

    # public
    pub = public_texts(stations, cfg.corridors.model.sea_level_standard_aki)
    pl: list[MapLayer] = []
    if zones is not None and len(zones):
        pl.append(
            MapLayer(
                name="Regular most vehicles need here",
                gdf=zones,
                style=_zone_style(zones),
                tooltip_field="band_label",
                popup_fields=_present(zones, (("band_label", "Regular needed [AKI]"),)),
                fill_opacity=0.25,
            )
        )
    if roads is not None:
        pl.append(road_layer(roads, road_total))
    if towns is not None and len(towns):
        pl.append(town_layer(towns, visible=True))
    pl.append(_station_layer(pub, GRADE_STYLE, PUBLIC_POPUP, name="Fuel stations"))
    maps["map_public.html"] = MapSpec(
        title=f"Gasoline grades at altitude — {cfg.name}",
        subtitle="What regular is sold where, which vehicles it suits, and what to do when "
        "driving down",
        layers=pl,
        cautions=CAUTIONS,
        basemap=basemap,
        generated_note=note,
    )
    return maps
