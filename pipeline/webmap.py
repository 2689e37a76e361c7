"""Self-contained, offline HTML maps (one builder for every audience map).

:func:`build_map_html` turns a :class:`MapSpec` -- vector layers from GeoDataFrames, their
styles, cautions and an optional shaded-relief :class:`~pipeline.hillshade.Basemap` -- into a
single HTML string that needs no network at all: Leaflet's script, stylesheet and control images
are inlined from the installed ``xstatic-leaflet`` package, the basemap is a ``data:`` PNG, and
no tile server, CDN, web font or marker image is referenced.

The page is built with folium (map, feature groups, image overlay, layer control) plus a small
inlined runtime script written for altigrade that draws the features, the legend, popups,
tooltips, a metric scale bar and a station search box.

Safety of hostile text
----------------------
Station, town and operator names come from outside and may contain markup or script. Every
data value reaches the page only as JSON inside ``<script type="application/json">`` with
``<``, ``>``, ``&``, U+2028 and U+2029 escaped (:func:`json_for_script`), and the runtime writes
it into the page only through ``textContent`` / DOM attributes, never ``innerHTML``. Static text
the caller supplies (title, subtitle, cautions, generated note) is HTML-escaped on the server
side so that it is visible even if scripts do not run. Layer names are HTML-escaped because
Leaflet's layer control inserts them as HTML.

Determinism
-----------
The same :class:`MapSpec` gives byte-identical HTML: folium's random element ids are replaced by
sequential ones before rendering and all JSON is written in a fixed order. The one line that may
differ between runs is the caller's ``generated_note`` (e.g. a timestamp), shown at the foot of
the side panel.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import json
import math
import re
import secrets
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Any

import folium
import geopandas
import numpy as np
import pandas as pd
import shapely
from branca.element import Element, MacroElement
from folium.template import Template

from pipeline.errors import AltigradeError
from pipeline.hillshade import Basemap

__all__ = [
    "CIVIDIS_5",
    "MISSING_COLOR",
    "OKABE_ITO",
    "OKABE_ITO_NAMED",
    "VIRIDIS_5",
    "CategoryStyle",
    "MapBuildError",
    "MapLayer",
    "MapSpec",
    "RampStyle",
    "build_map_html",
    "format_value",
    "in_map_crs",
    "json_for_script",
]

# --------------------------------------------------------------------------------------------
# Colour-blind-safe palettes
# --------------------------------------------------------------------------------------------

#: Okabe & Ito (2008) categorical palette, distinguishable under the common colour-vision
#: deficiencies. Okabe, M., Ito, K. (2008). Color Universal Design (CUD): how to make figures
#: and presentations that are friendly to colorblind people. (Hex values from memory.)
OKABE_ITO_NAMED: Mapping[str, str] = {
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "bluish_green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
    "black": "#000000",
}
#: The same eight colours as a tuple, in the published order.
OKABE_ITO: tuple[str, ...] = tuple(OKABE_ITO_NAMED.values())
#: matplotlib's ``viridis`` sampled at 0, 1/4, ..., 1 (perceptually uniform, CVD-safe).
VIRIDIS_5: tuple[str, ...] = ("#440154", "#3b528b", "#21918c", "#5ec962", "#fde725")
#: matplotlib's ``cividis`` sampled at 0, 1/4, ..., 1 (designed for deuteranomaly).
CIVIDIS_5: tuple[str, ...] = ("#00224e", "#434e6c", "#7d7c78", "#bcae6c", "#fee838")
#: Colour for features whose styling value is missing (NaN / None) under a ramp.
MISSING_COLOR = "#bdbdbd"

#: Colours given to layers without a style, in turn.
_PLAIN_COLORS = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9")
#: Decimal places kept for point coordinates (~0.1 m) and for line / polygon vertices (~1 m).
_POINT_DECIMALS = 6
_SHAPE_DECIMALS = 5
_MISSING_TEXT = "\u2014"  # em dash, shown for NaN / None
_HEX_COLOR = re.compile(r"^#(?:[0-9a-fA-F]{3}|[0-9a-fA-F]{6})$")


class MapBuildError(AltigradeError, ValueError):
    """A :class:`MapSpec` cannot be drawn (unknown column, bad style, no CRS, no cautions)."""


# --------------------------------------------------------------------------------------------
# Public specification objects
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class CategoryStyle:
    """Colour features by a categorical column.

    Attributes
    ----------
    column : str
        Column whose value (compared as ``str(value)``) selects the colour.
    colors : Mapping[str, str]
        Value -> ``#rrggbb``. The legend lists these in mapping order.
    labels : Mapping[str, str] or None
        Value -> legend text (defaults to the value itself).
    default : str
        Colour for values not in ``colors`` and for missing values (legend: "other / no data",
        listed only when such features exist).
    """

    column: str
    colors: Mapping[str, str]
    labels: Mapping[str, str] | None = None
    default: str = "#777777"


@dataclass(frozen=True)
class RampStyle:
    """Colour (and optionally line width / point radius) by a numeric column.

    Class ``i`` holds ``breaks[i-1] <= value < breaks[i]``; class 0 is ``value < breaks[0]``
    and the last class ``value >= breaks[-1]``. Missing values get :data:`MISSING_COLOR`.

    Attributes
    ----------
    column : str
        Numeric column.
    breaks : Sequence[float]
        Strictly increasing class limits, in the column's unit.
    colors : Sequence[str]
        ``len(breaks) + 1`` colours, lowest class first.
    width_range : (float, float) or None
        Line width / point radius [px] of the lowest and highest class, linear in between.
    label_fmt : str
        ``str.format`` pattern for the limits in the legend.
    unit : str
        Unit shown after each legend label (e.g. ``"kPa"``).
    """

    column: str
    breaks: Sequence[float]
    colors: Sequence[str]
    width_range: tuple[float, float] | None = None
    label_fmt: str = "{:.1f}"
    unit: str = ""


@dataclass(frozen=True)
class MapLayer:
    """One toggleable layer of the map.

    Attributes
    ----------
    name : str
        Label in the layer control and the legend.
    gdf : geopandas.GeoDataFrame
        Features in any CRS (must be set); reprojected to EPSG:4326 inside. Rows without
        geometry cannot be drawn; their count is stated in the legend.
    style : CategoryStyle or RampStyle or None
        None draws every feature in one colour.
    popup_fields : Sequence[(str, str)]
        ``(column, label with unit)`` pairs shown in the click popup, in order.
    tooltip_field : str or None
        Column shown on hover and as the popup heading.
    visible : bool
        Whether the layer is switched on when the page opens.
    searchable_fields : Sequence[str]
        Columns the search box matches (e.g. ``("station_id", "name")``).
    point_radius_px : float
        Circle-marker radius [px] when the style gives none.
    fill_opacity : float
        Polygon fill opacity [0-1]. Circle markers are always drawn nearly opaque (0.9) with a
        dark outline so that they stay legible over the relief.
    """

    name: str
    gdf: geopandas.GeoDataFrame
    style: CategoryStyle | RampStyle | None = None
    popup_fields: Sequence[tuple[str, str]] = ()
    tooltip_field: str | None = None
    visible: bool = True
    searchable_fields: Sequence[str] = ()
    point_radius_px: float = 6
    fill_opacity: float = 0.45


@dataclass(frozen=True)
class MapSpec:
    """Everything one HTML map shows.

    Attributes
    ----------
    title : str
        Page and panel title.
    layers : Sequence[MapLayer]
        Drawn bottom to top in this order.
    cautions : Sequence[str]
        Caution paragraphs, always visible in the side panel; at least one is required.
    basemap : Basemap or None
        Shaded relief drawn under the layers.
    subtitle : str
        Line under the title.
    generated_note : str
        The only text allowed to vary between otherwise identical runs (e.g. a timestamp);
        shown on one line at the foot of the panel.
    legend_title : str
        Heading of the legend.
    """

    title: str
    layers: Sequence[MapLayer]
    cautions: Sequence[str]
    basemap: Basemap | None = None
    subtitle: str = ""
    generated_note: str = ""
    legend_title: str = "Legend"


# --------------------------------------------------------------------------------------------
# Value formatting and JSON escaping
# --------------------------------------------------------------------------------------------


def format_value(value: Any) -> str:
    """Text shown for one attribute value in popups, tooltips and search results.

    Parameters
    ----------
    value : Any
        A cell of a GeoDataFrame.

    Returns
    -------
    str
        ``"—"`` for None, NaN, NaT, pd.NA, infinities and blank strings; ``"yes"``/``"no"``
        for booleans; integers as is; floats without trailing zeros, rounded to 4 decimals
        (numbers below 1e-3 in magnitude with 3 significant digits); dates in ISO 8601
        (timestamps at midnight as dates); anything else ``str(value)``, unchanged.

    Examples
    --------
    >>> format_value(float("nan")), format_value(87.0), format_value(70.1214999), format_value(None)
    ('—', '87', '70.1215', '—')
    """
    if value is None or value is pd.NA or value is pd.NaT:
        return _MISSING_TEXT
    if isinstance(value, bool | np.bool_):
        return "yes" if value else "no"
    if isinstance(value, int | np.integer):
        return str(int(value))
    if isinstance(value, float | np.floating):
        v = float(value)
        if not math.isfinite(v):
            return _MISSING_TEXT
        if v.is_integer() and abs(v) < 1e15:
            return str(int(v))
        if abs(v) < 1e-3:
            return f"{v:.3g}"
        return f"{v:.4f}".rstrip("0").rstrip(".")
    if isinstance(value, pd.Timestamp | _dt.datetime):
        ts = pd.Timestamp(value)
        if ts is pd.NaT:
            return _MISSING_TEXT
        if ts == ts.normalize() and ts.tzinfo is None:
            return ts.date().isoformat()
        return ts.isoformat()
    if isinstance(value, _dt.date):
        return value.isoformat()
    if isinstance(value, str):
        return value if value.strip() else _MISSING_TEXT
    try:
        if pd.isna(value):
            return _MISSING_TEXT
    except (TypeError, ValueError):
        pass
    return str(value)


def format_column(column: pd.Series) -> list[str]:
    """:func:`format_value` of every cell of ``column``; a numeric or boolean column formats
    each distinct value once."""
    dtype = column.dtype
    if pd.api.types.is_object_dtype(dtype) or not (
        pd.api.types.is_numeric_dtype(dtype) or pd.api.types.is_bool_dtype(dtype)
    ):
        return [format_value(v) for v in column.tolist()]
    codes, uniques = pd.factorize(column, use_na_sentinel=False)
    texts = [format_value(v) for v in uniques.tolist()]
    return [texts[k] for k in codes.tolist()]


_LONE_SURROGATE = re.compile("[\ud800-\udfff]")


@dataclass(frozen=True)
class RawJSON:
    """JSON text taken as is by :func:`json_for_script` (already valid JSON: no parse and
    re-dump of large geometry arrays)."""

    text: str


def json_for_script(obj: Any) -> str:
    """JSON text that is safe to place inside an HTML ``<script>`` element.

    Parameters
    ----------
    obj : Any
        JSON-serialisable data (no NaN: use None); :class:`RawJSON` values are inserted as
        their text.

    Returns
    -------
    str
        Compact JSON in which ``<``, ``>``, ``&``, U+2028, U+2029 and lone surrogates are
        written as ``\\uXXXX`` escapes. These characters only occur inside JSON strings, so
        the value is unchanged, while ``</script>``, ``<!--`` and line-separator tricks cannot
        end or alter the script element.
    """
    raws: list[str] = []
    token = secrets.token_hex(8)

    def _raw(o: Any) -> str:
        if not isinstance(o, RawJSON):
            raise TypeError(f"{type(o).__name__} is not JSON serialisable")
        raws.append(o.text)
        return f"{token}:{len(raws) - 1}"

    text = json.dumps(obj, ensure_ascii=False, separators=(",", ":"), allow_nan=False, default=_raw)
    if raws:
        pieces = re.split(f'"{token}:(\\d+)"', text)
        pieces[1::2] = [raws[int(i)] for i in pieces[1::2]]
        text = "".join(pieces)
    text = (
        text.replace("&", "\\u0026")
        .replace("<", "\\u003c")
        .replace(">", "\\u003e")
        .replace("\u2028", "\\u2028")
        .replace("\u2029", "\\u2029")
    )
    return _LONE_SURROGATE.sub(lambda m: f"\\u{ord(m.group()):04x}", text)


# --------------------------------------------------------------------------------------------
# Vendored Leaflet (inlined)
# --------------------------------------------------------------------------------------------


@lru_cache(maxsize=1)
def _leaflet_assets() -> tuple[str, str]:
    """Leaflet's JS and CSS from xstatic-leaflet, made self-contained.

    The stylesheet's ``url(images/*.png)`` become ``data:`` URIs and its comments are removed;
    the script's trailing source-map comment is removed (devtools would otherwise fetch it).
    """
    from xstatic.pkg import leaflet as xleaflet

    base = Path(xleaflet.BASE_DIR)
    js = (base / "leaflet.js").read_text(encoding="utf-8")
    css = (base / "leaflet.css").read_text(encoding="utf-8")
    js = re.sub(r"\n?//# sourceMappingURL=\S*\s*$", "\n", js)
    css = re.sub(r"/\*.*?\*/", "", css, flags=re.S)

    def inline(match: re.Match[str]) -> str:
        data = (base / "images" / match.group(1)).read_bytes()
        return "url(data:image/png;base64," + base64.b64encode(data).decode("ascii") + ")"

    css = re.sub(r"url\(images/([A-Za-z0-9_.-]+\.png)\)", inline, css)
    if "</script" in js.lower() or "</style" in css.lower():  # pragma: no cover - vendor check
        raise MapBuildError("vendored Leaflet contains a closing tag; cannot inline it")
    return js, css


# --------------------------------------------------------------------------------------------
# Page chrome: CSS and the runtime script (written for altigrade)
# --------------------------------------------------------------------------------------------

_PAGE_CSS = """
html, body { height: 100%; margin: 0; padding: 0; }
body.ag-body { display: flex; flex-direction: row; height: 100vh; overflow: hidden;
  font-family: system-ui, -apple-system, "Segoe UI", Roboto, "Noto Sans", "DejaVu Sans",
  Arial, sans-serif; color: #1d2733; background: #eef1f4; }
.ag-panel { order: 0; flex: 0 0 310px; width: 310px; display: flex; flex-direction: column;
  background: #f9fafb; border-right: 1px solid #cfd6de; box-shadow: 2px 0 6px rgba(0,0,0,.08);
  z-index: 1000; min-height: 0; }
.ag-head { padding: 14px 16px 10px; border-bottom: 1px solid #e1e6eb; }
.ag-title { margin: 0; font-size: 17px; line-height: 1.25; font-weight: 650; }
.ag-subtitle { margin: 4px 0 0; font-size: 12.5px; color: #4b5866; line-height: 1.35; }
.ag-scroll { flex: 1 1 auto; overflow-y: auto; padding: 10px 16px; min-height: 0; }
.ag-section-title { font-size: 11px; letter-spacing: .06em; text-transform: uppercase;
  color: #5a6776; margin: 6px 0 6px; font-weight: 650; }
.ag-search input { box-sizing: border-box; width: 100%; padding: 7px 9px; font-size: 14px;
  border: 1px solid #aeb8c2; border-radius: 4px; background: #fff; color: inherit; }
.ag-search input:focus { outline: 2px solid #0072B2; outline-offset: 0; border-color: #0072B2; }
.ag-results { list-style: none; margin: 4px 0 0; padding: 0; max-height: 220px; overflow-y: auto; }
.ag-results li { margin: 0; }
.ag-results button { display: block; width: 100%; text-align: start; border: 0;
  border-bottom: 1px solid #e5e9ee; background: #fff; padding: 5px 8px; font: inherit;
  font-size: 13px; cursor: pointer; color: inherit; overflow: hidden; text-overflow: ellipsis;
  white-space: nowrap; }
.ag-results button:hover, .ag-results button:focus { background: #e8f1f8; outline: none; }
.ag-results .ag-result-layer { color: #66727f; font-size: 11px; margin-inline-start: 6px; }
.ag-results .ag-none { font-size: 12.5px; color: #66727f; padding: 4px 2px; }
.ag-legend { margin-top: 12px; }
.ag-legend-layer { margin: 0 0 10px; }
.ag-legend-layer.ag-off { opacity: .45; }
.ag-legend-name { font-size: 13px; font-weight: 600; margin: 0 0 2px; overflow: hidden;
  text-overflow: ellipsis; white-space: nowrap; }
.ag-legend-caption { font-size: 12px; color: #4b5866; margin: 0 0 3px; }
.ag-legend-row { display: flex; align-items: center; font-size: 12.5px; line-height: 1.2;
  margin: 2px 0; }
.ag-legend-row span.ag-label { overflow: hidden; text-overflow: ellipsis; white-space: nowrap; }
.ag-swatch { flex: 0 0 auto; display: inline-block; margin-inline-end: 8px;
  box-sizing: border-box; }
.ag-swatch-point { border-radius: 50%; border: 1px solid #1d2733; }
.ag-swatch-line { width: 26px; border-radius: 2px; }
.ag-swatch-polygon { width: 18px; height: 13px; border: 1.5px solid; }
.ag-legend-note { font-size: 11.5px; color: #66727f; margin: 2px 0 0; }
.ag-cautions { flex: 0 0 auto; margin: 0; padding: 10px 16px 10px 13px; background: #fff7e6;
  border-top: 1px solid #e8d3a8; border-left: 4px solid #b36b00; font-size: 12.5px;
  line-height: 1.4; max-height: 38vh; overflow-y: auto; }
.ag-cautions h2 { font-size: 12px; margin: 0 0 4px; text-transform: uppercase;
  letter-spacing: .06em; color: #7a4a00; }
.ag-cautions p { margin: 0 0 4px; }
.ag-generated { margin: 0; padding: 5px 16px 7px; font-size: 11px; color: #66727f;
  border-top: 1px solid #e1e6eb; }
.ag-map { order: 1; flex: 1 1 auto; width: auto !important; height: 100% !important;
  position: relative !important; min-width: 0; }
.leaflet-container { background: #e9edf1; font-family: inherit; }
.ag-popup { font-size: 13px; max-width: 320px; }
.ag-popup-title { font-weight: 650; font-size: 14px; margin: 0 0 2px; max-width: 300px;
  overflow: hidden; text-overflow: ellipsis; white-space: nowrap; }
.ag-popup-layer { font-size: 11px; color: #66727f; margin: 0 0 5px; }
.ag-popup table { border-collapse: collapse; }
.ag-popup th { text-align: start; font-weight: 500; color: #4b5866; padding: 1px 10px 1px 0;
  vertical-align: top; white-space: nowrap; }
.ag-popup td { padding: 1px 0; max-width: 190px; overflow: hidden; text-overflow: ellipsis;
  white-space: nowrap; font-variant-numeric: tabular-nums; }
.ag-popup-open .leaflet-tooltip-pane { display: none; }
.ag-tip { display: inline-block; max-width: 260px; overflow: hidden; text-overflow: ellipsis;
  white-space: nowrap; vertical-align: bottom; }
.leaflet-control-layers-expanded { font-size: 13px; padding: 6px 10px 6px 8px; }
.leaflet-control-layers label > span > span { display: inline-block; max-width: 260px;
  overflow: hidden; text-overflow: ellipsis; white-space: nowrap; vertical-align: bottom; }
.leaflet-control-scale-line { font-size: 11px; }
@media (max-width: 700px) {
  body.ag-body { flex-direction: column; }
  .ag-panel { flex: 0 0 auto; width: auto; max-height: 46vh; border-right: 0;
    border-bottom: 1px solid #cfd6de; }
  .ag-cautions { max-height: 18vh; }
}
@media print { .ag-search { display: none; } }
"""

# The runtime: reads the JSON data block and draws everything with DOM text nodes only.
_RUNTIME_JS = r"""
(function () {
  "use strict";
  function el(tag, cls, text) {
    var e = document.createElement(tag);
    if (cls) { e.className = cls; }
    if (text !== undefined && text !== null) { e.textContent = String(text); }
    return e;
  }
  function norm(s) {
    s = String(s);
    if (s.normalize) { s = s.normalize("NFKD").replace(/[\u0300-\u036f]/g, ""); }
    return s.toLowerCase();
  }
  function isPointGeom(t) { return t === "Point" || t === "MultiPoint"; }
  function isPolyGeom(t) { return t === "Polygon" || t === "MultiPolygon"; }

  function popupNode(spec, props) {
    var root = el("div", "ag-popup");
    if (props.t !== undefined && props.t !== null) {
      var h = el("div", "ag-popup-title", props.t);
      h.dir = "auto"; h.title = props.t; root.appendChild(h);
    }
    root.appendChild(el("div", "ag-popup-layer", spec.name));
    if (spec.fields.length) {
      var table = el("table"), body = el("tbody");
      for (var i = 0; i < spec.fields.length; i++) {
        var tr = el("tr"), th = el("th", null, spec.fields[i]), td = el("td", null, props.p[i]);
        th.scope = "row"; td.dir = "auto"; td.title = props.p[i];
        tr.appendChild(th); tr.appendChild(td); body.appendChild(tr);
      }
      table.appendChild(body); root.appendChild(table);
    }
    return root;
  }

  function swatch(geom, entry) {
    var s = el("span", "ag-swatch ag-swatch-" + geom);
    if (geom === "point") {
      var d = Math.max(8, Math.min(20, 2 * entry.size));
      s.style.width = d + "px"; s.style.height = d + "px"; s.style.backgroundColor = entry.color;
    } else if (geom === "line") {
      s.style.height = Math.max(2, Math.min(12, entry.size)) + "px";
      s.style.backgroundColor = entry.color;
    } else {
      s.style.borderColor = entry.color; s.style.backgroundColor = entry.color;
      s.style.backgroundClip = "padding-box";
      s.style.opacity = "0.85";
    }
    return s;
  }

  function buildLegend(container, legend, groups, map) {
    var sections = [];
    legend.forEach(function (sec, li) {
      var box = el("div", "ag-legend-layer");
      box.appendChild(el("div", "ag-legend-name", sec.title)).title = sec.title;
      if (sec.caption) { box.appendChild(el("div", "ag-legend-caption", sec.caption)); }
      sec.entries.forEach(function (entry) {
        var row = el("div", "ag-legend-row");
        row.appendChild(swatch(sec.geom, entry));
        var lab = el("span", "ag-label", entry.label); lab.dir = "auto"; lab.title = entry.label;
        row.appendChild(lab);
        box.appendChild(row);
      });
      if (sec.note) { box.appendChild(el("div", "ag-legend-note", sec.note)); }
      container.appendChild(box);
      sections.push(box);
    });
    function sync() {
      sections.forEach(function (box, li) {
        box.classList.toggle("ag-off", !map.hasLayer(groups[li]));
      });
    }
    map.on("overlayadd overlayremove layeradd layerremove", sync);
    sync();
  }

  function buildSearch(root, index, map) {
    var input = root.querySelector("input"), list = root.querySelector("ul");
    var current = [];
    function pick(entry) {
      if (!map.hasLayer(entry.group)) { map.addLayer(entry.group); }
      if (entry.layer.getLatLng) {
        map.setView(entry.layer.getLatLng(), Math.max(map.getZoom(), 12), { animate: false });
      } else {
        map.fitBounds(entry.layer.getBounds(), { maxZoom: 13, padding: [30, 30], animate: false });
      }
      entry.layer.openPopup();
    }
    function render() {
      while (list.firstChild) { list.removeChild(list.firstChild); }
      var q = norm(input.value).trim();
      current = [];
      if (!q) { return; }
      var starts = [], contains = [];
      index.forEach(function (entry) {
        var best = -1;
        entry.keys.forEach(function (k) {
          var pos = k.indexOf(q);
          if (pos === 0) { best = 0; } else if (pos > 0 && best !== 0) { best = 1; }
        });
        if (best === 0) { starts.push(entry); } else if (best === 1) { contains.push(entry); }
      });
      current = starts.concat(contains).slice(0, 15);
      if (!current.length) { list.appendChild(el("li", "ag-none", "No match")); return; }
      current.forEach(function (entry) {
        var li = el("li"), b = el("button", "ag-result");
        b.type = "button";
        var lab = el("span", "ag-result-label", entry.label); lab.dir = "auto";
        b.appendChild(lab);
        b.appendChild(el("span", "ag-result-layer", entry.layerName));
        b.title = entry.label;
        b.addEventListener("click", function () { pick(entry); });
        b.addEventListener("keydown", function (ev) {
          if (ev.key === "ArrowDown" && li.nextSibling) {
            li.nextSibling.firstChild.focus(); ev.preventDefault();
          }
          if (ev.key === "ArrowUp") {
            if (li.previousSibling) { li.previousSibling.firstChild.focus(); }
            else { input.focus(); }
            ev.preventDefault();
          }
        });
        li.appendChild(b); list.appendChild(li);
      });
    }
    input.addEventListener("input", render);
    input.addEventListener("keydown", function (ev) {
      if (ev.key === "Enter" && current.length) { pick(current[0]); ev.preventDefault(); }
      if (ev.key === "ArrowDown" && list.firstChild && list.firstChild.firstChild &&
          list.firstChild.firstChild.focus) {
        list.firstChild.firstChild.focus(); ev.preventDefault();
      }
    });
    return pick;
  }

  window.altigradeBuild = function (map, groups, data) {
    var api = { map: map, groups: groups, featureLayers: [], index: [] };
    window.altigrade = api;
    L.control.scale({ metric: true, imperial: false, maxWidth: 150, position: "bottomleft" })
      .addTo(map);
    // Hover tooltips would sit under an open popup and repeat its heading: hide them meanwhile.
    map.on("popupopen", function () { L.DomUtil.addClass(map.getContainer(), "ag-popup-open"); });
    map.on("popupclose", function () {
      L.DomUtil.removeClass(map.getContainer(), "ag-popup-open");
    });

    data.layers.forEach(function (spec, li) {
      var group = groups[li], made = [];
      function colorOf(k) { return k >= 0 ? spec.colors[k] : spec.missing; }
      function sizeOf(k) { return (spec.sizes && k >= 0) ? spec.sizes[k] : spec.size; }
      function style(f) {
        var k = f.properties.k, t = f.geometry.type, c = colorOf(k);
        if (isPointGeom(t)) {
          return { radius: sizeOf(k), color: "#1d2733", weight: 1, opacity: 0.9,
                   fillColor: c, fillOpacity: 0.9 };
        }
        if (isPolyGeom(t)) {
          return { color: c, weight: 1.5, opacity: 0.9, fillColor: c,
                   fillOpacity: spec.fillOpacity };
        }
        return { color: c, weight: sizeOf(k), opacity: 0.95, lineCap: "round", lineJoin: "round" };
      }
      if (spec.geom === "line") {
        L.geoJSON(spec.features, {
          interactive: false,
          style: function (f) {
            return { color: "#ffffff", weight: sizeOf(f.properties.k) + 3, opacity: 0.75,
                     lineCap: "round", lineJoin: "round" };
          }
        }).addTo(group);
      }
      L.geoJSON(spec.features, {
        pointToLayer: function (f, latlng) {
          return L.circleMarker(latlng, { radius: spec.size });
        },
        style: style,
        onEachFeature: function (f, layer) {
          var props = f.properties;
          made.push(layer);
          // Tooltip first: Leaflet also opens tooltips on click, and the popup's handler,
          // bound second, must run after it to close the tooltip under the popup.
          if (props.t !== undefined && props.t !== null) {
            var tip = el("span", "ag-tip", props.t); tip.dir = "auto";
            layer.bindTooltip(tip, { direction: "top", sticky: !isPointGeom(f.geometry.type),
                                     offset: [0, -4], opacity: 0.95 });
          }
          layer.bindPopup(function () { return popupNode(spec, props); },
                          { maxWidth: 340, minWidth: 160, autoPanPadding: [20, 20] });
          layer.on("popupopen", function () { if (layer.closeTooltip) { layer.closeTooltip(); } });
          if (props.q) {
            var parts = props.q.filter(function (v) { return v !== null && v !== ""; });
            if (parts.length) {
              api.index.push({ layer: layer, group: group, layerName: spec.name,
                               label: parts.join(" \u00b7 "), keys: parts.map(norm) });
            }
          }
        }
      }).addTo(group);
      api.featureLayers.push(made);
    });

    var legendBox = document.getElementById("ag-legend-items");
    if (legendBox) { buildLegend(legendBox, data.legend, groups, map); }
    var searchBox = document.getElementById("ag-search");
    if (searchBox) { api.pick = buildSearch(searchBox, api.index, map); }

    if (data.bounds) {
      map.fitBounds(data.bounds, { padding: [28, 28], maxZoom: 13, animate: false });
    }
    api.ready = true;
  };
})();
"""


class _Raw(Element):
    """An element that renders a fixed string (no Jinja parsing of vendor code)."""

    def __init__(self, text: str) -> None:
        super().__init__()
        self._name = "Raw"
        self._text = text

    def render(self, **kwargs: Any) -> str:
        return self._text


_RELIEF_ID = "altigrade-relief"


class _ReliefOverlay(folium.raster_layers.ImageOverlay):
    """Leaflet image overlay whose image URL is read from the page element ``_RELIEF_ID``."""

    _template = Template(
        """
        {% macro script(this, kwargs) %}
            var {{ this.get_name() }} = L.imageOverlay(
                document.getElementById({{ this.relief_id|tojson }}).textContent,
                {{ this.bounds|tojson }},
                {{ this.options|tojavascript }}
            );
        {% endmacro %}
        """
    )
    relief_id = _RELIEF_ID


class _PageBody(MacroElement):
    """Side panel (title, search, legend, cautions), the JSON data block, and the script that
    starts the runtime.

    The panel and the data are added as raw text, never through a macro: branca turns the
    output of a macro into a new Jinja template and renders it, so data passed through a macro
    would be evaluated as template code (``{{ ... }}`` in a station name runs Python).
    """

    _template = Template(
        """
        {% macro script(this, kwargs) %}
            document.body.className = "ag-body";
            document.getElementById({{ this.map_name|tojson }}).className += " ag-map";
            {{ this.map_name }}.invalidateSize();
            window.altigradeBuild(
                {{ this.map_name }},
                [{{ this.group_names|join(", ") }}],
                JSON.parse(document.getElementById("altigrade-data").textContent)
            );
        {% endmacro %}
        """
    )

    def __init__(
        self, panel_html: str, data_json: str, map_name: str, group_names: list[str]
    ) -> None:
        super().__init__()
        self._name = "PageBody"
        self.panel_html = panel_html
        self.data_json = data_json
        self.map_name = map_name
        self.group_names = group_names

    def render(self, **kwargs: Any) -> None:
        data = f'<script type="application/json" id="altigrade-data">{self.data_json}</script>'
        self.get_root().html.add_child(_Raw(self.panel_html + data), name=self.get_name())
        super().render(**kwargs)


# --------------------------------------------------------------------------------------------
# Layer preparation
# --------------------------------------------------------------------------------------------


def _check_color(color: str, where: str) -> str:
    if not isinstance(color, str) or not _HEX_COLOR.match(color):
        raise MapBuildError(f"{where}: colour {color!r} is not a #rgb or #rrggbb hex colour")
    return color


def _geom_kind(gdf: geopandas.GeoDataFrame) -> str:
    types = {t for t in gdf.geometry.geom_type.dropna().unique()}
    if types and types <= {"Point", "MultiPoint"}:
        return "point"
    if types and types <= {"LineString", "MultiLineString", "LinearRing"}:
        return "line"
    if types and types <= {"Polygon", "MultiPolygon"}:
        return "polygon"
    if not types:
        return "point"
    # Mixed layers: the legend shows the kind of the majority; every feature is still drawn.
    counts = gdf.geometry.geom_type.value_counts()
    top = str(counts.index[0])
    return "point" if "Point" in top else "line" if "Line" in top else "polygon"


def _is_missing(value: Any) -> bool:
    """True for None, NaN, NaT and pd.NA (strings, even blank ones, are values)."""
    if value is None or isinstance(value, str):
        return value is None
    try:
        return bool(pd.isna(value))
    except (TypeError, ValueError):
        return False


def _category_classes(style: CategoryStyle, values: pd.Series) -> tuple[list[int], bool]:
    pos = {str(k): i for i, k in enumerate(style.colors.keys())}
    out = [-1 if _is_missing(v) else pos.get(str(v), -1) for v in values]
    return out, any(k < 0 for k in out)


def _ramp_classes(style: RampStyle, values: pd.Series) -> tuple[list[int], bool]:
    num = pd.to_numeric(values, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
    idx = np.searchsorted(np.asarray(style.breaks, dtype=np.float64), num, side="right")
    idx = np.where(np.isfinite(num), idx, -1)
    return [int(i) for i in idx], bool((idx < 0).any())


def _ramp_labels(style: RampStyle) -> list[str]:
    fmt = style.label_fmt.format
    unit = f" {style.unit}" if style.unit else ""
    b = list(style.breaks)
    labels = [f"< {fmt(b[0])}{unit}"]
    labels += [f"{fmt(b[i - 1])} \u2013 {fmt(b[i])}{unit}" for i in range(1, len(b))]
    labels.append(f"\u2265 {fmt(b[-1])}{unit}")
    return labels


def _validate_layer(layer: MapLayer, li: int) -> None:
    where = f"layer {li} ({layer.name!r})"
    if not isinstance(layer.gdf, geopandas.GeoDataFrame):
        raise MapBuildError(f"{where}: gdf must be a GeoDataFrame")
    if len(layer.gdf) and layer.gdf.crs is None:
        raise MapBuildError(f"{where}: GeoDataFrame has no CRS; set one before mapping")
    needed = [c for c, _ in layer.popup_fields] + list(layer.searchable_fields)
    if layer.tooltip_field:
        needed.append(layer.tooltip_field)
    if layer.style is not None:
        needed.append(layer.style.column)
    missing = sorted({c for c in needed if c not in layer.gdf.columns})
    if missing:
        raise MapBuildError(
            f"{where}: missing column(s) {missing}; "
            f"available: {sorted(map(str, layer.gdf.columns))}"
        )
    if not 0.0 <= layer.fill_opacity <= 1.0:
        raise MapBuildError(f"{where}: fill_opacity must be within 0-1")
    if not layer.point_radius_px > 0:
        raise MapBuildError(f"{where}: point_radius_px must be positive")
    style = layer.style
    if isinstance(style, RampStyle):
        b = [float(x) for x in style.breaks]
        if (
            not b
            or any(not math.isfinite(x) for x in b)
            or any(y <= x for x, y in zip(b, b[1:], strict=False))
        ):
            raise MapBuildError(f"{where}: ramp breaks must be finite and strictly increasing")
        if len(style.colors) != len(b) + 1:
            raise MapBuildError(
                f"{where}: ramp needs len(breaks)+1 = {len(b) + 1} colours, got {len(style.colors)}"
            )
        for c in style.colors:
            _check_color(c, where)
        if style.width_range is not None and not all(w > 0 for w in style.width_range):
            raise MapBuildError(f"{where}: width_range must be positive")
    elif isinstance(style, CategoryStyle):
        for c in style.colors.values():
            _check_color(c, where)
        _check_color(style.default, where)
    elif style is not None:
        raise MapBuildError(f"{where}: style must be CategoryStyle, RampStyle or None")


def in_map_crs(gdf: geopandas.GeoDataFrame | None) -> geopandas.GeoDataFrame | None:
    """``gdf`` in EPSG:4326 (WGS 84 longitude/latitude), the CRS the maps draw in. A layer
    shown on several maps can be put in it once, beforehand (:mod:`pipeline.maps` does);
    :func:`build_map_html` reprojects here whatever is not in it yet. None, an empty frame,
    or one without a CRS (which the builder rejects by name) is returned as it is."""
    if gdf is None or not len(gdf) or gdf.crs is None or gdf.crs.equals("EPSG:4326"):
        return gdf
    return gdf.to_crs("EPSG:4326")


def _prepare_layer(
    layer: MapLayer, li: int, plain_color: str
) -> tuple[dict[str, Any], dict[str, Any], tuple[float, float, float, float] | None]:
    """(layer data for the runtime, legend section, lon/lat bounds or None)."""
    _validate_layer(layer, li)
    gdf = in_map_crs(layer.gdf)
    geoms = gdf.geometry.to_numpy()
    has_geom = ~(shapely.is_missing(geoms) | shapely.is_empty(geoms))
    n_missing = int((~has_geom).sum())
    kind = _geom_kind(gdf[has_geom]) if has_geom.any() else "point"
    decimals = _POINT_DECIMALS if kind == "point" else _SHAPE_DECIMALS

    style = layer.style
    base_size = float(layer.point_radius_px) if kind == "point" else 3.0
    sizes: list[float] | None = None
    classes: list[int]
    entries: list[dict[str, Any]]
    caption = ""
    labels_by_col = {c: lab for c, lab in layer.popup_fields}
    if style is None:
        colors = [plain_color]
        classes = [0] * len(gdf)
        entries = [{"color": plain_color, "label": layer.name, "size": base_size}]
        missing_color = plain_color
        extra = False
    else:
        # The legend caption is the column's popup label; raw column names are not shown.
        caption = labels_by_col.get(style.column, "")
        if isinstance(style, CategoryStyle):
            colors = list(style.colors.values())
            classes, extra = _category_classes(style, gdf[style.column])
            labels = style.labels or {}
            entries = [
                {"color": c, "label": str(labels.get(k, k)), "size": base_size}
                for k, c in style.colors.items()
            ]
            missing_color = style.default
            if extra:
                entries.append(
                    {"color": style.default, "label": "other / no data", "size": base_size}
                )
        else:
            colors = list(style.colors)
            classes, extra = _ramp_classes(style, gdf[style.column])
            n = len(colors)
            if style.width_range is not None:
                w0, w1 = (float(w) for w in style.width_range)
                sizes = [round(w0 + (w1 - w0) * i / max(n - 1, 1), 2) for i in range(n)]
            missing_color = MISSING_COLOR
            entries = [
                {"color": c, "label": lab, "size": sizes[i] if sizes else base_size}
                for i, (c, lab) in enumerate(zip(colors, _ramp_labels(style), strict=True))
            ]
            if extra:
                entries.append({"color": MISSING_COLOR, "label": "no data", "size": base_size})

    popup_cols = [c for c, _ in layer.popup_fields]
    tip = [layer.tooltip_field] if layer.tooltip_field else []
    used = dict.fromkeys(popup_cols + list(layer.searchable_fields) + tip)
    text = {c: format_column(gdf[c]) for c in used}
    drawn = np.flatnonzero(has_geom)
    # Vertices rounded, never simplified: the shapes are those of the input.
    rounded = shapely.to_geojson(shapely.transform(geoms[drawn], lambda c: np.round(c, decimals)))
    # GeoJSON text straight from GEOS: a geometry is never parsed into Python lists
    dump = json.JSONEncoder(ensure_ascii=False, separators=(",", ":"), allow_nan=False).encode
    features = []
    for pos, geometry in zip(drawn.tolist(), rounded.tolist(), strict=True):
        props: dict[str, Any] = {"k": classes[pos], "p": [text[c][pos] for c in popup_cols]}
        if layer.tooltip_field:
            props["t"] = text[layer.tooltip_field][pos]
        if layer.searchable_fields:
            vals = [text[c][pos] for c in layer.searchable_fields]
            props["q"] = [v if v != _MISSING_TEXT else None for v in vals]
        features.append(f'{{"type":"Feature","geometry":{geometry},"properties":{dump(props)}}}')

    note = None
    if n_missing:
        note = f"{n_missing} feature(s) without a location are not drawn."
    layer_data = {
        "name": layer.name,
        "geom": kind,
        "colors": colors,
        "missing": missing_color,
        "sizes": sizes,
        "size": base_size,
        "fillOpacity": float(layer.fill_opacity),
        "fields": [lab for _, lab in layer.popup_fields],
        "features": RawJSON('{"type":"FeatureCollection","features":[' + ",".join(features) + "]}"),
    }
    legend = {
        "title": layer.name,
        "caption": caption,
        "geom": kind,
        "entries": entries,
        "note": note,
    }
    bounds = None
    if has_geom.any():
        minx, miny, maxx, maxy = shapely.total_bounds(geoms[has_geom])
        bounds = (float(minx), float(miny), float(maxx), float(maxy))
    return layer_data, legend, bounds


def _panel_html(spec: MapSpec, cautions: Sequence[str], searchable: bool) -> str:
    esc = html.escape
    parts = ['<aside class="ag-panel" aria-label="Map information">', '<div class="ag-head">']
    parts.append(f'<h1 class="ag-title" dir="auto">{esc(spec.title)}</h1>')
    if spec.subtitle:
        parts.append(f'<p class="ag-subtitle" dir="auto">{esc(spec.subtitle)}</p>')
    parts.append("</div>")
    parts.append('<div class="ag-scroll">')
    if searchable:
        parts.append(
            '<div class="ag-search" id="ag-search" role="search">'
            '<div class="ag-section-title"><label for="ag-search-input">Find a station'
            "</label></div>"
            '<input id="ag-search-input" type="search" autocomplete="off" spellcheck="false" '
            'placeholder="Name or id" aria-controls="ag-search-results">'
            '<ul class="ag-results" id="ag-search-results" aria-live="polite"></ul></div>'
        )
    parts.append(
        '<div class="ag-legend"><div class="ag-section-title">'
        f"{esc(spec.legend_title)}</div>"
        '<div id="ag-legend-items"></div></div>'
    )
    parts.append("</div>")
    parts.append('<section class="ag-cautions" id="ag-cautions" aria-label="Cautions">')
    parts.append("<h2>Cautions</h2>")
    parts.extend(f'<p dir="auto">{esc(c)}</p>' for c in cautions)
    parts.append("</section>")
    if spec.generated_note:
        # The one line allowed to differ between runs (e.g. a timestamp from the caller).
        parts.append(f'<p class="ag-generated" dir="auto">{esc(spec.generated_note)}</p>')
    parts.append("</aside>")
    return "".join(parts)


def _assign_ids(root: Element) -> None:
    """Replace folium/branca random element ids by sequential ones (determinism)."""
    counter = 0

    def walk(e: Element) -> None:
        nonlocal counter
        counter += 1
        e._id = f"{counter:03d}"
        for extra in ("header", "html", "script"):
            child = getattr(e, extra, None)
            if isinstance(child, Element):
                walk(child)
        for child in list(e._children.values()):
            walk(child)

    walk(root)


def build_map_html(spec: MapSpec) -> str:
    """Render a :class:`MapSpec` into one self-contained, offline HTML page.

    Parameters
    ----------
    spec : MapSpec
        Title, layers, cautions and optional basemap.

    Returns
    -------
    str
        A complete HTML document (UTF-8 text; write it with ``encoding="utf-8"``). It loads
        nothing from the network, and identical specs give identical strings.

    Raises
    ------
    MapBuildError
        No cautions; a layer without CRS; a missing column; a malformed style.

    Notes
    -----
    Layout: a side panel (title, subtitle, search box, legend, and the cautions pinned at its
    foot, always visible) beside the map, so panels never cover the data; on narrow screens the
    panel sits above the map. The map has a layer control (expanded), a metric scale bar and
    zoom buttons, and opens fitted to the data (or to the basemap when there is no data).
    Coordinates are rounded to 6 decimals for points and 5 for lines/polygons; nothing is
    simplified.
    """
    cautions = [str(c) for c in spec.cautions if str(c).strip()]
    if not cautions:
        raise MapBuildError("a map needs at least one caution (planning aid, maker, regulations)")

    layers_data, legend, all_bounds = [], [], []
    plain = 0
    for li, layer in enumerate(spec.layers):
        color = _PLAIN_COLORS[plain % len(_PLAIN_COLORS)]
        if layer.style is None:
            plain += 1
        data, leg, bounds = _prepare_layer(layer, li, color)
        layers_data.append(data)
        legend.append(leg)
        if bounds is not None and layer.visible:
            # the view opens on what is switched on (a hidden layer of stray rows must not
            # zoom the map out to the other side of the world)
            all_bounds.append(bounds)

    if all_bounds:
        b = np.array(all_bounds)
        fit = [
            [float(b[:, 1].min()), float(b[:, 0].min())],
            [float(b[:, 3].max()), float(b[:, 2].max())],
        ]
    elif spec.basemap is not None:
        (s, w), (n, e) = spec.basemap.bounds_latlon
        fit = [[s, w], [n, e]]
    else:
        fit = None
    centre = (
        [0.0, 0.0]
        if fit is None
        else [
            (fit[0][0] + fit[1][0]) / 2.0,
            (fit[0][1] + fit[1][1]) / 2.0,
        ]
    )

    m = folium.Map(
        location=centre,
        tiles=None,
        zoom_start=2 if fit is None else 9,
        min_zoom=2,
        max_zoom=18,
        attribution_control=False,
        zoom_snap=0.25,
        zoom_delta=0.5,
    )
    # Nothing from a CDN: Leaflet is inlined below and nothing else is needed.
    m.default_js = []
    m.default_css = []
    figure = m.get_root()
    leaflet_js, leaflet_css = _leaflet_assets()
    figure.header.add_child(_Raw(f"<title>{html.escape(spec.title)}</title>"), name="ag_title")
    figure.header.add_child(_Raw(f"<style>{leaflet_css}</style>"), name="ag_leaflet_css")
    figure.header.add_child(_Raw(f"<style>{_PAGE_CSS}</style>"), name="ag_page_css")
    figure.header.add_child(_Raw(f"<script>{leaflet_js}</script>"), name="ag_leaflet_js")
    figure.header.add_child(_Raw(f"<script>{_RUNTIME_JS}</script>"), name="ag_runtime_js")

    if spec.basemap is not None:
        url = "data:image/png;base64," + base64.b64encode(spec.basemap.png_bytes).decode("ascii")
        # the image travels as raw text (base64 cannot close the element), not through the
        # overlay's template: branca would compile megabytes of it as Jinja code
        figure.header.add_child(
            _Raw(f'<script type="text/plain" id="{_RELIEF_ID}">{url}</script>'),
            name="ag_relief_png",
        )
        (s, w), (n, e) = spec.basemap.bounds_latlon
        _ReliefOverlay(
            image="data:,",  # a placeholder: the template reads the image from the page
            bounds=[[float(s), float(w)], [float(n), float(e)]],
            name="Shaded relief",
            pixelated=False,
            pane="tilePane",
            opacity=1.0,
        ).add_to(m)

    groups = []
    for layer in spec.layers:
        g = folium.FeatureGroup(name=html.escape(layer.name), show=bool(layer.visible))
        g.add_to(m)
        groups.append(g)
    folium.LayerControl(position="topright", collapsed=False).add_to(m)

    searchable = any(layer.searchable_fields for layer in spec.layers)
    data = {"layers": layers_data, "legend": legend, "bounds": fit}
    body = _PageBody(
        panel_html=_panel_html(spec, cautions, searchable),
        data_json=json_for_script(data),
        map_name="",
        group_names=[],
    )
    body.add_to(m)

    _assign_ids(figure)
    body.map_name = m.get_name()
    body.group_names = [g.get_name() for g in groups]
    return figure.render()
