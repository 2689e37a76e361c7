"""Tests of pipeline.webmap: offline, deterministic, hostile-text-safe HTML maps.

Unit tests read the HTML and its JSON data block; tests marked ``browser`` open the page in
headless Debian chromium (see tests/browser_support.py) with the network cut off.
"""

from __future__ import annotations

import difflib
import json
import re

import geopandas as gpd
import matplotlib
import numpy as np
import pandas as pd
import pytest
from browser_support import launch_browser, open_local_html, require_browser, save_screenshot
from matplotlib.colors import to_hex
from pyproj import Transformer
from shapely.geometry import LineString, Point, Polygon

from pipeline.hillshade import Basemap
from pipeline.webmap import (
    CIVIDIS_5,
    MISSING_COLOR,
    OKABE_ITO,
    VIRIDIS_5,
    CategoryStyle,
    MapBuildError,
    MapLayer,
    MapSpec,
    RampStyle,
    RawJSON,
    _leaflet_assets,
    build_map_html,
    format_column,
    format_value,
    json_for_script,
)

UTM = "EPSG:32608"  # demo region CRS (SCHEMA.md)
IMG_PAYLOAD = "<img src=x onerror=alert(1)>"
SCRIPT_PAYLOAD = "</script><script>alert(1)</script>"
LONG_NAME = "Long " + "x" * 4995
RTL_NAME = "محطة الجبل"  # invented Arabic-script name ("mountain station")
EMOJI_NAME = "Summit Pump ⛽🏔️"
LINE_SEP_NAME = "Line\u2028Sep\u2029Station"
CAUTIONS = (
    "A planning aid only.",
    "Follow the vehicle maker's fuel recommendation.",
    "Local fuel regulations and licensed practice take precedence.",
)


def utm(km_e: float, km_s: float) -> tuple[float, float]:
    """Point km east / km south of the demo region's upper-left corner (SCHEMA.md)."""
    return 300000.0 + 1000.0 * km_e, 4500000.0 - 1000.0 * km_s


def stations() -> gpd.GeoDataFrame:
    names = [
        "Kestrel Stop",
        IMG_PAYLOAD,
        SCRIPT_PAYLOAD,
        RTL_NAME,
        EMOJI_NAME,
        LONG_NAME,
        LINE_SEP_NAME,
    ]
    where = [(30, 40), (60, 70), (95, 95), (120, 130), (85, 60), (140, 50), (45, 150)]
    return gpd.GeoDataFrame(
        {
            "station_id": [f"ST-{i + 1:04d}" for i in range(len(names))],
            "name": names,
            "operator": ["Northwind Petroleum", None, np.nan, "Ridgeway Oil", "", "x", "y"],
            "status": ["ok", "below", "ok", "review", "mystery", "ok", None],
            "min_aki": [85.0, 86.5, np.nan, 87.0, 85.25, 86.0, None],
            "inspected": pd.to_datetime(["2024-03-01", None, "2023-11-15", None, None, None, None]),
        },
        geometry=[Point(*utm(*p)) for p in where],
        crs=UTM,
    )


def roads() -> gpd.GeoDataFrame:
    return gpd.GeoDataFrame(
        {"name": ["Route Nine", "Pass Road", "Mill Lane"], "aadt": [12000.0, 5000.0, np.nan]},
        geometry=[
            LineString([utm(10, 30), utm(95, 95), utm(160, 160)]),
            LineString([utm(30, 40), utm(85, 60)]),
            LineString([utm(45, 150), utm(95, 95)]),
        ],
        crs=UTM,
    )


def zones() -> gpd.GeoDataFrame:
    return gpd.GeoDataFrame(
        {"zone_id": ["Z1", "Z2"], "share_legacy": [0.3, 0.1]},
        geometry=[
            Polygon([utm(5, 5), utm(100, 5), utm(100, 90), utm(5, 90)]),
            Polygon([utm(100, 90), utm(175, 90), utm(175, 175), utm(100, 175)]),
        ],
        crs=UTM,
    )


STATUS_STYLE = CategoryStyle(
    "status",
    {"ok": "#009E73", "review": "#E69F00", "below": "#D55E00"},
    labels={"ok": "Meets requirement", "review": "Needs review", "below": "Below requirement"},
)
AADT_STYLE = RampStyle(
    "aadt",
    [1000, 5000],
    ["#8c96a0", "#5a6470", "#2b323a"],
    width_range=(2, 6),
    label_fmt="{:,.0f}",
    unit="veh/day",
)
SHARE_STYLE = RampStyle("share_legacy", [0.2], ["#d9e6f2", "#4a90c2"], label_fmt="{:.0%}")


def station_layer(**kw) -> MapLayer:
    args = dict(
        name="Stations",
        gdf=stations(),
        style=STATUS_STYLE,
        popup_fields=[
            ("station_id", "Station id"),
            ("name", "Name"),
            ("operator", "Operator"),
            ("min_aki", "Lowest usable AKI"),
            ("inspected", "Last inspection"),
        ],
        tooltip_field="name",
        searchable_fields=("station_id", "name"),
    )
    args.update(kw)
    return MapLayer(**args)


def sample_spec(**kw) -> MapSpec:
    args = dict(
        title="Demo Highlands — minimum grade",
        subtitle="Fictional demo data",
        layers=[
            MapLayer(
                "Fleet zones",
                zones(),
                SHARE_STYLE,
                popup_fields=[("zone_id", "Zone")],
                visible=False,
            ),
            MapLayer(
                "Roads",
                roads(),
                AADT_STYLE,
                popup_fields=[("name", "Road"), ("aadt", "AADT (veh/day)")],
                tooltip_field="name",
            ),
            station_layer(),
        ],
        cautions=CAUTIONS,
        generated_note="Generated 2024-05-01T10:00Z",
    )
    args.update(kw)
    return MapSpec(**args)


def data_block(html_text: str) -> tuple[str, dict]:
    m = re.search(
        r'<script type="application/json" id="altigrade-data">(.*?)</script>', html_text, re.S
    )
    assert m, "data block missing"
    return m.group(1), json.loads(m.group(1))


@pytest.fixture(scope="module")
def sample_html() -> str:
    return build_map_html(sample_spec())


# ---------------------------------------------------------------------- offline / static ---


def test_no_external_resource_is_referenced(sample_html):
    leaflet_js, _ = _leaflet_assets()
    assert sample_html.count(leaflet_js) == 1
    rest = sample_html.replace(leaflet_js, "")
    assert not re.findall(r"https?://", rest), "URL outside the vendored Leaflet script"
    # Inside vendored Leaflet only the SVG namespace and its own home page (attribution
    # prefix, disabled here) occur; neither is fetched.
    assert set(re.findall(r"https?://[^\s\"'<>)]*", leaflet_js)) <= {
        "http://www.w3.org/2000/svg",
        "https://leafletjs.com",
    }
    assert "<link" not in sample_html
    assert not re.search(r"<script[^>]*\ssrc\s*=", sample_html)
    assert not re.search(r"<img[^>]*\ssrc\s*=", sample_html)
    for url in re.findall(r"url\(([^)]*)\)", rest):
        assert url.startswith("data:") or url == "#default#VML", url
    assert "sourceMappingURL" not in sample_html


def test_leaflet_is_inlined_from_xstatic_and_no_cdn_library():
    html_text = build_map_html(sample_spec(layers=[station_layer()]))
    assert "Leaflet 1.9" in html_text  # xstatic-leaflet's header comment
    for name in ("bootstrap", "jquery", "font-awesome", "fontawesome", "awesome-markers"):
        assert name not in html_text.lower()


def test_same_spec_gives_identical_html(sample_html):
    assert build_map_html(sample_spec()) == sample_html


def test_generated_note_is_the_only_varying_line(sample_html):
    other = build_map_html(sample_spec(generated_note="Generated 2031-12-31T23:59Z"))
    changed = [
        line
        for line in difflib.unified_diff(
            sample_html.splitlines(), other.splitlines(), lineterm="", n=0
        )
        if line[:1] in "+-" and not line.startswith(("+++", "---"))
    ]
    assert len(changed) == 2
    assert "2024-05-01T10:00Z" in changed[0] and "2031-12-31T23:59Z" in changed[1]


def test_no_random_folium_ids_remain(sample_html):
    assert not re.search(r"[0-9a-f]{32}", sample_html.replace(_leaflet_assets()[0], ""))


# ------------------------------------------------------------------------ hostile text ---


def test_json_for_script_escapes_and_round_trips():
    value = {"s": f"{SCRIPT_PAYLOAD}&<!--\u2028\u2029{IMG_PAYLOAD}\ud800", "n": [1, None]}
    text = json_for_script(value)
    for ch in "<>&\u2028\u2029\ud800":
        assert ch not in text
    assert json.loads(text) == value


def test_json_for_script_inserts_raw_json_and_escapes_it_too():
    # reference: the standard library's json parser reads back the whole document
    inner = {"type": "Point", "coordinates": [1.5, -2.25], "s": f"{SCRIPT_PAYLOAD}&\u2028"}
    value = {"a": RawJSON(json.dumps(inner, ensure_ascii=False)), "b": ["x", RawJSON("[1,2]")]}
    text = json_for_script(value)
    for ch in "<>&\u2028":
        assert ch not in text
    assert json.loads(text) == {"a": inner, "b": ["x", [1, 2]]}
    # a plain string that looks like a placeholder stays a string
    assert json.loads(json_for_script({"a": RawJSON("1"), "b": '"0:0"'})) == {"a": 1, "b": '"0:0"'}
    with pytest.raises(TypeError):
        json_for_script({"x": object()})


def test_json_for_script_rejects_nan():
    with pytest.raises(ValueError):
        json_for_script({"x": float("nan")})


def test_hostile_names_only_in_escaped_json(sample_html):
    raw, data = data_block(sample_html)
    for bad in ("<", ">", "&", "\u2028", "\u2029"):
        assert bad not in raw
    assert IMG_PAYLOAD not in sample_html
    assert SCRIPT_PAYLOAD not in sample_html
    # Values intact inside the data (long strings are truncated only by CSS).
    props = [f["properties"] for f in data["layers"][2]["features"]["features"]]
    tips = [p["t"] for p in props]
    assert tips == [
        "Kestrel Stop",
        IMG_PAYLOAD,
        SCRIPT_PAYLOAD,
        RTL_NAME,
        EMOJI_NAME,
        LONG_NAME,
        LINE_SEP_NAME,
    ]
    assert len(props[5]["p"][1]) == 5000


def test_caller_text_is_html_escaped():
    spec = sample_spec(
        title=f"T {SCRIPT_PAYLOAD}",
        subtitle=IMG_PAYLOAD,
        cautions=[f"C {IMG_PAYLOAD}"],
        layers=[station_layer(name=f"L {IMG_PAYLOAD}")],
        generated_note=SCRIPT_PAYLOAD,
    )
    html_text = build_map_html(spec)
    assert IMG_PAYLOAD not in html_text and SCRIPT_PAYLOAD not in html_text
    assert "&lt;img src=x onerror=alert(1)&gt;" in html_text
    # Leaflet's layer control sets names with innerHTML: they go in HTML-escaped.
    assert '"L \\u0026lt;img src=x onerror=alert(1)\\u0026gt;"' in html_text


# ---------------------------------------------------------------------- legend / values ---


def test_category_legend_entries_in_mapping_order_with_other(sample_html):
    _, data = data_block(sample_html)
    sec = data["legend"][2]
    assert sec["title"] == "Stations" and sec["geom"] == "point"
    assert [e["label"] for e in sec["entries"]] == [
        "Meets requirement",
        "Needs review",
        "Below requirement",
        "other / no data",
    ]
    assert [e["color"] for e in sec["entries"]] == ["#009E73", "#E69F00", "#D55E00", "#777777"]
    classes = [f["properties"]["k"] for f in data["layers"][2]["features"]["features"]]
    assert classes == [0, 2, 0, 1, -1, 0, -1]  # "mystery" and None fall to the default


def test_category_legend_without_other_when_all_known():
    gdf = stations().iloc[[0, 1, 3]]
    _, data = data_block(build_map_html(sample_spec(layers=[station_layer(gdf=gdf)])))
    assert [e["label"] for e in data["legend"][0]["entries"]][-1] == "Below requirement"


def test_ramp_legend_labels_units_and_widths(sample_html):
    _, data = data_block(sample_html)
    sec = data["legend"][1]
    assert sec["geom"] == "line" and sec["caption"] == "AADT (veh/day)"
    assert [e["label"] for e in sec["entries"]] == [
        "< 1,000 veh/day",
        "1,000 \u2013 5,000 veh/day",
        "\u2265 5,000 veh/day",
        "no data",
    ]
    assert data["layers"][1]["sizes"] == [2.0, 4.0, 6.0]
    assert sec["entries"][-1]["color"] == MISSING_COLOR
    # Class i holds breaks[i-1] <= v < breaks[i]: 12000 -> 2, 5000 (on a break) -> 2, NaN -> -1
    assert [f["properties"]["k"] for f in data["layers"][1]["features"]["features"]] == [2, 2, -1]
    assert [e["label"] for e in data["legend"][0]["entries"]] == ["< 20%", "\u2265 20%"]


def test_popup_values_show_dash_for_missing(sample_html):
    raw, data = data_block(sample_html)
    p = [f["properties"]["p"] for f in data["layers"][2]["features"]["features"]]
    assert p[0] == ["ST-0001", "Kestrel Stop", "Northwind Petroleum", "85", "2024-03-01"]
    assert p[1][2:] == ["\u2014", "86.5", "\u2014"]  # None operator, NaT date
    assert p[2][2:4] == ["\u2014", "\u2014"]  # NaN operator, NaN AKI
    assert p[4][2:4] == ["\u2014", "85.25"]  # blank string
    assert p[6][3] == "\u2014"  # None in a float column
    for token in ('"nan"', '"NaN"', '"None"', '"NaT"', "NaN,", 'null,"p"'):
        assert token not in raw


@pytest.mark.parametrize(
    "value,text",
    [
        (None, "\u2014"),
        (float("nan"), "\u2014"),
        (np.nan, "\u2014"),
        (pd.NA, "\u2014"),
        (pd.NaT, "\u2014"),
        (float("inf"), "\u2014"),
        ("", "\u2014"),
        ("  ", "\u2014"),
        (True, "yes"),
        (np.bool_(False), "no"),
        (87, "87"),
        (np.int64(3), "3"),
        (87.0, "87"),
        (70.12149, "70.1215"),
        (0.5, "0.5"),
        (0.000123, "0.000123"),
        (1234567.0, "1234567"),
        (pd.Timestamp("2024-03-01"), "2024-03-01"),
        (pd.Timestamp("2024-03-01 12:30"), "2024-03-01T12:30:00"),
        ("ST-0001", "ST-0001"),
    ],
)
def test_format_value(value, text):
    assert format_value(value) == text


@pytest.mark.parametrize(
    "column",
    [
        pd.Series([1.0, np.nan, -0.0, 0.0, 70.12149, 1e-5, 87.0, 87.0, np.inf, 2.5e15]),
        pd.Series([3, 3, -7, 0], dtype="int64"),
        pd.Series([1, None, 3], dtype="Int64"),
        pd.Series([True, False, True]),
        pd.Series([1, True, 1.0, "1", None, np.nan, pd.NA], dtype=object),  # equal hashes
        pd.Series(["a", "", " b "], dtype="string"),
        pd.Series(pd.to_datetime(["2024-03-01 00:00", None, "2024-03-01 12:30"])),
        pd.Series([], dtype=float),
    ],
)
def test_format_column_equals_format_value_cell_by_cell(column):
    assert format_column(column) == [format_value(v) for v in column.tolist()]


def test_format_column_on_random_floats_with_repeats():
    rng = np.random.default_rng(3)
    v = rng.choice(np.r_[rng.normal(0, 1e3, 200), rng.normal(0, 1e-4, 50), np.nan], 5000)
    col = pd.Series(v)
    assert format_column(col) == [format_value(x) for x in col.tolist()]


# ------------------------------------------------------------------ geometry and bounds ---


def test_point_coordinates_rounded_and_match_pyproj(sample_html):
    _, data = data_block(sample_html)
    feats = data["layers"][2]["features"]["features"]
    gdf = stations()
    tr = Transformer.from_crs(UTM, "EPSG:4326", always_xy=True)  # reference transform
    for f, geom in zip(feats, gdf.geometry, strict=True):
        lon, lat = f["geometry"]["coordinates"]
        ref_lon, ref_lat = tr.transform(geom.x, geom.y)
        assert lon == pytest.approx(ref_lon, abs=6e-7) and lat == pytest.approx(ref_lat, abs=6e-7)
        assert round(lon, 6) == lon and round(lat, 6) == lat


def test_fit_bounds_cover_the_visible_layers(sample_html):
    """The view opens on the layers switched on (the hidden zones layer is left out)."""
    _, data = data_block(sample_html)
    (s, w), (n, e) = data["bounds"]
    # Reference: every vertex of every visible layer transformed by pyproj.
    xy = np.vstack(
        [
            np.asarray(g.exterior.coords if g.geom_type == "Polygon" else g.coords)
            for gdf in (roads(), stations())
            for g in gdf.geometry
        ]
    )
    lon, lat = Transformer.from_crs(UTM, "EPSG:4326", always_xy=True).transform(xy[:, 0], xy[:, 1])
    assert (s, w, n, e) == pytest.approx((lat.min(), lon.min(), lat.max(), lon.max()), abs=1e-5)


def test_rows_without_geometry_are_counted_in_legend():
    gdf = stations()
    gdf.loc[1, "geometry"] = None
    _, data = data_block(build_map_html(sample_spec(layers=[station_layer(gdf=gdf)])))
    assert len(data["layers"][0]["features"]["features"]) == 6
    assert data["legend"][0]["note"].startswith("1 feature(s) without a location")


def test_basemap_is_embedded_as_data_png():
    bm = Basemap(png_bytes=b"\x89PNG\r\n\x1a\nfake", bounds_latlon=((39.0, -137.5), (40.7, -135.3)))
    html_text = build_map_html(sample_spec(basemap=bm))
    assert (
        '<script type="text/plain" id="altigrade-relief">data:image/png;base64,iVBORw0KGgpmYWtl<'
        in html_text
    )
    assert "[[39.0, -137.5], [40.7, -135.3]]" in html_text
    assert '"Shaded relief"' in html_text


def test_empty_layer_and_no_data_still_builds():
    empty = gpd.GeoDataFrame({"name": []}, geometry=[], crs=UTM)
    _, data = data_block(build_map_html(sample_spec(layers=[MapLayer("Nothing", empty)])))
    assert data["bounds"] is None and data["layers"][0]["features"]["features"] == []


# ------------------------------------------------------------------------------ errors ---


@pytest.mark.parametrize(
    "layer,match",
    [
        (lambda: station_layer(tooltip_field="nope"), "missing column"),
        (lambda: station_layer(gdf=stations().set_crs(None, allow_override=True)), "no CRS"),
        (lambda: station_layer(style=RampStyle("min_aki", [85, 86], ["#000000"])), "colours"),
        (lambda: station_layer(style=RampStyle("min_aki", [86, 85], ["#000"] * 3)), "increasing"),
        (lambda: station_layer(style=CategoryStyle("status", {"ok": "red;x:url(y)"})), "colour"),
    ],
)
def test_bad_specs_raise_map_build_error(layer, match):
    with pytest.raises(MapBuildError, match=match):
        build_map_html(sample_spec(layers=[layer()]))


def test_cautions_are_required():
    with pytest.raises(MapBuildError, match="caution"):
        build_map_html(sample_spec(cautions=[" "]))
    assert issubclass(MapBuildError, ValueError)


# ---------------------------------------------------------------------------- palettes ---


@pytest.mark.parametrize("name,palette", [("viridis", VIRIDIS_5), ("cividis", CIVIDIS_5)])
def test_sequential_palettes_match_matplotlib(name, palette):
    # Reference library: matplotlib's colormaps sampled at 0, 1/4, ..., 1.
    cmap = matplotlib.colormaps[name]
    assert palette == tuple(to_hex(cmap(i / 4)) for i in range(5))


def test_okabe_ito_has_eight_distinct_hex_colours():
    assert len(set(OKABE_ITO)) == 8 and all(re.fullmatch(r"#[0-9A-F]{6}", c) for c in OKABE_ITO)


# ---------------------------------------------------------------------------- browser ---

LAYER_NAMES = ["Fleet zones", "Roads", "Stations"]


@pytest.fixture(scope="module")
def browser():
    require_browser()
    with launch_browser() as b:
        yield b


@pytest.fixture(scope="module")
def map_file(tmp_path_factory, sample_html):
    path = tmp_path_factory.mktemp("webmap") / "map.html"
    path.write_text(sample_html, encoding="utf-8")
    return path


def _marker_xy(page, layer_index: int, feature_index: int) -> tuple[float, float]:
    return page.evaluate(
        """([li, fi]) => {
            const l = altigrade.featureLayers[li][fi];
            const p = altigrade.map.latLngToContainerPoint(l.getLatLng());
            const r = altigrade.map.getContainer().getBoundingClientRect();
            return [r.left + p.x, r.top + p.y];
        }""",
        [layer_index, feature_index],
    )


def _no_injection(page, html_text: str) -> None:
    found = page.evaluate(
        """() => ({
            imgs: document.querySelectorAll("img:not(.leaflet-image-layer)").length,
            scripts: document.scripts.length,
            handlers: document.querySelectorAll("[onerror], [onload]").length,
        })"""
    )
    # As many script elements as the static page has (Leaflet, runtime, data, folium's).
    assert found == {"imgs": 0, "scripts": html_text.count("<script"), "handlers": 0}


@pytest.mark.browser
def test_browser_draws_the_shaded_relief_image(browser, tmp_path):
    import io as _io

    from PIL import Image

    buf = _io.BytesIO()
    Image.new("RGB", (40, 30), (120, 90, 60)).save(buf, format="PNG")
    bm = Basemap(png_bytes=buf.getvalue(), bounds_latlon=((40.55, -136.9), (40.65, -136.7)))
    path = tmp_path / "relief.html"
    path.write_text(build_map_html(sample_spec(basemap=bm)), encoding="utf-8")
    with open_local_html(browser, path) as (page, rec):
        img = page.locator("img.leaflet-image-layer")
        assert img.count() == 1
        page.wait_for_function("() => document.querySelector('img.leaflet-image-layer').complete")
        got = img.evaluate("e => [e.src.slice(0, 22), e.naturalWidth, e.naturalHeight]")
        assert got == ["data:image/png;base64,", 40, 30]
        labels = page.locator(".leaflet-control-layers-overlays label").all_inner_texts()
        assert [t.strip() for t in labels] == ["Shaded relief", *LAYER_NAMES]
    rec.assert_clean()


@pytest.mark.browser
def test_browser_page_loads_offline_and_clean(browser, map_file, sample_html, tmp_path):
    with open_local_html(browser, map_file) as (page, rec):
        labels = page.locator(".leaflet-control-layers-overlays label").all_inner_texts()
        assert [t.strip() for t in labels] == LAYER_NAMES
        assert page.locator("#ag-cautions").is_visible()
        assert "vehicle maker's fuel recommendation" in page.locator("#ag-cautions").inner_text()
        assert (
            page.locator(".leaflet-control-scale-line").inner_text().strip().endswith(("km", "m"))
        )
        legend = page.locator("#ag-legend-items").inner_text()
        assert "Below requirement" in legend and "\u2265 5,000 veh/day" in legend
        checked = page.locator(".leaflet-control-layers-overlays input").evaluate_all(
            "els => els.map(e => e.checked)"
        )
        assert checked == [False, True, True]  # "Fleet zones" starts hidden
        dimmed = page.locator(".ag-legend-layer.ag-off .ag-legend-name").all_inner_texts()
        assert dimmed == ["Fleet zones"]
        # Road casings + roads (2 x 3) and 7 station markers drawn; hidden polygons are not.
        assert page.locator(".leaflet-overlay-pane path").count() == 2 * 3 + 7
        page.locator(".leaflet-control-layers-overlays input").first.check()
        assert page.locator(".leaflet-overlay-pane path").count() == 2 + 2 * 3 + 7
        assert page.locator(".ag-legend-layer.ag-off").count() == 0
        shot = save_screenshot(page, tmp_path / "map.png")
        assert shot.stat().st_size > 10_000
        _no_injection(page, sample_html)
    rec.assert_clean()


@pytest.mark.browser
@pytest.mark.parametrize("index,payload", [(1, IMG_PAYLOAD), (2, SCRIPT_PAYLOAD), (5, LONG_NAME)])
def test_browser_click_marker_shows_hostile_name_as_text(
    browser, map_file, sample_html, index, payload
):
    with open_local_html(browser, map_file) as (page, rec):
        page.mouse.click(*_marker_xy(page, 2, index))
        title = page.locator(".leaflet-popup .ag-popup-title")
        title.wait_for(state="visible", timeout=5000)
        assert title.text_content() == payload
        tips = page.locator(".leaflet-tooltip").all()
        assert not any(t.is_visible() for t in tips)  # no tooltip left under the popup
        assert page.locator(".leaflet-popup td").nth(1).text_content() == payload
        if payload is LONG_NAME:  # intact in the DOM, cut by CSS on screen
            assert page.evaluate(
                "() => { const e = document.querySelector('.ag-popup-title');"
                " return e.scrollWidth > e.clientWidth; }"
            )
        _no_injection(page, sample_html)
    rec.assert_clean()


@pytest.mark.browser
def test_browser_search_finds_station_and_opens_popup(browser, map_file, sample_html):
    with open_local_html(browser, map_file) as (page, rec):
        page.fill("#ag-search-input", "st-0004")
        result = page.locator("#ag-search-results button")
        assert result.count() == 1
        assert result.first.inner_text().startswith(f"ST-0004 \u00b7 {RTL_NAME}")
        result.first.click()
        title = page.locator(".leaflet-popup .ag-popup-title")
        title.wait_for(state="visible", timeout=5000)
        assert title.text_content() == RTL_NAME
        centre = page.evaluate("() => altigrade.map.getCenter()")
        lon, lat = Transformer.from_crs(UTM, "EPSG:4326", always_xy=True).transform(*utm(120, 130))
        assert centre["lat"] == pytest.approx(lat, abs=0.05)
        assert centre["lng"] == pytest.approx(lon, abs=0.05)
        page.fill("#ag-search-input", "onerror")  # hostile name found as plain text
        assert (
            page.locator("#ag-search-results button")
            .first.inner_text()
            .startswith(f"ST-0002 \u00b7 {IMG_PAYLOAD}")
        )
        page.fill("#ag-search-input", "zzzz-nothing")
        assert page.locator("#ag-search-results").inner_text().strip() == "No match"
        _no_injection(page, sample_html)
    rec.assert_clean()


@pytest.mark.browser
def test_browser_harness_detects_network_dialogs_and_errors(browser, tmp_path):
    # The harness itself must catch what the map tests rely on it to catch.
    page_file = tmp_path / "bad.html"
    page_file.write_text(
        "<!DOCTYPE html><html><body><img src='http://192.0.2.1/x.png'>"
        "<script>fetch('https://example.invalid/data.json').catch(() => {});"
        "alert('hi'); console.error('boom'); window.done = true; undefinedFn();</script>"
        "</body></html>",
        encoding="utf-8",
    )
    with open_local_html(browser, page_file, wait_for="window.done === true") as (page, rec):
        page.wait_for_timeout(200)
    assert "http://192.0.2.1/x.png" in rec.blocked_requests
    assert "https://example.invalid/data.json" in rec.blocked_requests
    assert rec.dialogs == ["alert: hi"]
    assert "boom" in rec.console_errors
    assert any("undefinedFn" in e for e in rec.page_errors)
    with pytest.raises(AssertionError, match="network request attempted"):
        rec.assert_clean()
