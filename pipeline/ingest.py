"""Row-level validation of the station table.

Every row read ends in exactly one of two tables: accepted stations (typed columns, point
geometry) or rejected stations (all of its original text plus a reason). Rows in = accepted +
rejected, always. Problems with the file as a whole (a required column missing, two columns
that mean the same) raise :class:`~pipeline.errors.InputFileError` naming the file and the
column; an unknown ``stations_crs`` raises :class:`~pipeline.errors.ConfigError`.

Nothing is guessed silently: a value that could be read in two ways (degrees or metres, a
percentage or a fraction, swapped lon/lat) rejects its row with a reason that says so; only
unambiguous spellings are normalised (column aliases, 0–360 longitudes, decimal commas,
Unicode minus signs, spaces as thousands separators), each with a note.
"""

from __future__ import annotations

import datetime as dt
import difflib
import math
import re

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely
from pyproj import CRS
from pyproj.exceptions import CRSError

from pipeline.errors import ConfigError, InputFileError
from pipeline.io import RawTable, show_text

__all__ = [
    "REQUIRED",
    "NUMERIC_RANGES",
    "RESERVED_COLUMNS",
    "IngestResult",
    "parse_date",
    "validate_stations",
]

#: Columns a station table must have (besides a position).
REQUIRED = ("station_id", "name", "regular_aki")
#: Optional columns and their plausibility ranges (inclusive) in the column's unit.
NUMERIC_RANGES: dict[str, tuple[float, float]] = {
    "regular_aki": (75.0, 100.0),
    "midgrade_aki": (80.0, 100.0),
    "premium_aki": (85.0, 105.0),
    "field_test_aki": (70.0, 105.0),
    "volume_l_per_month": (0.0, 1e9),
    "regular_share": (0.0, 1.0),
    "past_test_failures": (0.0, 1000.0),
    "complaints": (0.0, 1e6),
    "elevation_m": (-500.0, 9000.0),
}
DATE_COLUMNS = ("last_inspection_date", "field_test_date")
#: Dates before this are taken for typos (e.g. 0205 for 2025), not inspections.
EARLIEST_DATE = dt.date(1950, 1, 1)
TEXT_COLUMNS = ("station_id", "name", "operator")
#: Input columns whose names the pipeline uses for its own columns; renamed ``input_<name>``.
RESERVED_COLUMNS = ("source_row", "reject_reason", "geometry", "geom", "fid", "ogc_fid")
#: Alternative spellings understood for the standard columns.
ALIASES = {
    "longitude": "lon",
    "long": "lon",
    "lng": "lon",
    "latitude": "lat",
    "id": "station_id",
    "station": "station_id",
    "station_name": "name",
    "regular": "regular_aki",
    "easting": "x",
    "northing": "y",
}


class IngestResult:
    """Accepted stations (GeoDataFrame, input CRS → WGS 84) and rejected rows (text + reason)."""

    def __init__(self, accepted: gpd.GeoDataFrame, rejected: gpd.GeoDataFrame, notes: list[str]):
        self.accepted = accepted
        self.rejected = rejected
        self.notes = notes


# ----------------------------------------------------------------------------- parsing

_SPACE_THOUSANDS = re.compile(r"[+-]?\d{1,3}(?:[ \u00a0\u202f]\d{3})+(?:[.,]\d+)?")
_DOT_THOUSANDS = re.compile(r"[+-]?\d{1,3}(?:\.\d{3})+(?:,\d*)?")
_PLAIN_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")


def _parse_number(text: str, decimal: str) -> float:
    """One cell as a number; NaN when empty or not a finite number written in ASCII digits."""
    t = text.strip().replace("\u2212", "-")
    if not t:
        return math.nan
    if _SPACE_THOUSANDS.fullmatch(t):
        t = t.replace(" ", "").replace("\u00a0", "").replace("\u202f", "")
    if decimal == "," and ("," in t or _DOT_THOUSANDS.fullmatch(t)):
        t = t.replace(".", "").replace(",", ".")
    if not _PLAIN_NUMBER.fullmatch(t):
        return math.nan
    v = float(t)
    return v if math.isfinite(v) else math.nan


def _num(s: pd.Series, decimal: str) -> np.ndarray:
    """Numbers from text [column unit]; NaN where empty or not a finite number.

    Decimal-comma tables: a cell with a comma, or with dots grouping thousands (1.250,5), is
    read the decimal-comma way; a cell with a single decimal point (85.5) is read as written.
    Spaces (also no-break and narrow no-break) grouping thousands and the Unicode minus sign
    are understood; hexadecimal, digit separators ``_``, non-ASCII digits and infinities are not.
    """
    return np.array([_parse_number(str(v), decimal) for v in s], dtype=float)


_SLASH_DATE = re.compile(r"(\d{4})/(\d{1,2})/(\d{1,2})(.*)")


def parse_date(text: str) -> dt.date | None:
    """A calendar date from ISO 8601 text (``2025-05-01``, ``20250501``, ``2025-05-01T10:00``,
    with or without a UTC offset, or ``2025/05/01`` as spreadsheets write it); None if the text
    is not such a date. A date-time gives its own calendar date (no time-zone shift)."""
    s = str(text).strip()
    if not s:
        return None
    m = _SLASH_DATE.fullmatch(s)
    if m:
        s = f"{m[1]}-{int(m[2]):02d}-{int(m[3]):02d}{m[4]}"
    try:
        return dt.date.fromisoformat(s)
    except ValueError:
        pass
    try:
        return dt.datetime.fromisoformat(s).date()
    except ValueError:
        return None


def _normalise_columns(frame: pd.DataFrame, source: str) -> tuple[pd.DataFrame, list[str]]:
    notes = []
    lower = {c: str(c).strip().lower().replace(" ", "_") for c in frame.columns}
    present = set(lower.values())
    target_of: dict[str, str] = {}
    for c, lc in lower.items():
        target = ALIASES.get(lc, lc)
        if target != lc and target in present:
            notes.append(f"column '{c}' not used: the table also has '{target}'")
            target = lc
        if target in RESERVED_COLUMNS:
            notes.append(f"column '{c}' kept as 'input_{target}' ('{target}' is a pipeline column)")
            target = f"input_{target}"
        elif target != lc:
            notes.append(f"column '{c}' read as '{target}'")
        target_of[c] = target
    by_target: dict[str, list[str]] = {}
    for c, t in target_of.items():
        by_target.setdefault(t, []).append(c)
    clash = {t: cs for t, cs in by_target.items() if len(cs) > 1}
    if clash:
        t, cs = next(iter(clash.items()))
        raise InputFileError(
            f"{source}: columns {' and '.join(show_text(c) for c in cs)} both mean '{t}'; "
            "keep one of them"
        )
    return frame.rename(columns=target_of), notes


# ---------------------------------------------------------------------------- validation


def validate_stations(
    table: RawTable, *, source: str, default_crs: str, today: dt.date
) -> IngestResult:
    """Validate a raw station table row by row.

    Parameters
    ----------
    table : RawTable as read by :func:`pipeline.io.read_station_table`
    source : file name used in messages
    default_crs : CRS of x/y or lon/lat columns of a text table (config ``inputs.stations_crs``)
    today : the run date; dates after it are rejected

    Returns
    -------
    IngestResult with ``accepted`` in EPSG:4326 (columns typed, ``source_row`` kept) and
    ``rejected`` (all original columns as text, ``source_row``, ``reject_reason``, geometry
    where the coordinates could be read and lie on the globe).

    Raises
    ------
    InputFileError
        A required column is missing, or two columns mean the same.
    ConfigError
        ``default_crs`` is not a CRS.
    """
    frame, notes = _normalise_columns(table.frame.copy(), source)
    notes = list(getattr(table, "notes", [])) + notes
    cols = set(frame.columns)
    have_geom = table.geometry is not None
    missing = [c for c in REQUIRED if c not in cols]
    if not have_geom and not ({"lon", "lat"} <= cols or {"x", "y"} <= cols):
        missing.append("lon/lat (or x/y)")
    if missing:
        hints = []
        for m in missing:
            close = difflib.get_close_matches(
                m.split("/")[0], [str(c) for c in frame.columns], n=1, cutoff=0.6
            )
            if close:
                hints.append(f"'{m}' (is {show_text(close[0])} meant?)")
            else:
                hints.append(f"'{m}'")
        found = ", ".join(show_text(c, 40) for c in list(frame.columns)[:30]) or "none"
        raise InputFileError(
            f"{source}: missing required column(s) {', '.join(hints)}; found columns: {found}"
        )
    try:
        crs_in = CRS.from_user_input(default_crs)
    except CRSError:
        raise ConfigError(
            f"key 'inputs.stations_crs': {show_text(default_crs)} is not a CRS pyproj knows "
            "(e.g. 'EPSG:4326')"
        ) from None
    n = len(frame)
    reasons: list[list[str]] = [[] for _ in range(n)]

    def flag(mask: np.ndarray, msg) -> None:
        for i in np.flatnonzero(mask):
            reasons[i].append(msg(i) if callable(msg) else msg)

    issues = list(getattr(table, "row_issues", None) or [""] * n)
    for i, text in enumerate(issues[:n]):
        if text:
            reasons[i].append(text)

    for c in TEXT_COLUMNS:
        if c in cols:
            frame[c] = frame[c].astype(str).str.strip()
    flag((frame["station_id"] == "").to_numpy(), "empty station_id")
    flag((frame["name"] == "").to_numpy(), "empty name")

    # --- position
    if have_geom:
        geom = table.geometry
        kinds = geom.geom_type.to_numpy()
        empty = geom.isna().to_numpy() | geom.is_empty.to_numpy()
        multi1 = (kinds == "MultiPoint") & ~empty
        pts = geom.copy()
        if multi1.any():
            counts = shapely.get_num_geometries(geom.to_numpy())
            flag(
                multi1 & (counts > 1),
                "multi-point geometry with several points: ambiguous position",
            )
            single = multi1 & (counts == 1)
            pts[single] = shapely.get_geometry(geom.to_numpy()[single], 0)
        notpoint = ~empty & ~np.isin(kinds, ["Point", "MultiPoint"])
        flag(notpoint, lambda i: f"geometry is a {kinds[i]}, not a point")
        flag(empty, "missing geometry")
        ok = ~empty & ~notpoint
        xs = np.full(n, np.nan)
        ys = np.full(n, np.nan)
        pa = pts.to_numpy()
        okp = ok & (shapely.get_type_id(pa) == 0)
        xs[okp] = shapely.get_x(pa[okp])
        ys[okp] = shapely.get_y(pa[okp])
        xs[~np.isfinite(xs)] = np.nan
        ys[~np.isfinite(ys)] = np.nan
        flag(okp & (np.isnan(xs) | np.isnan(ys)), "point geometry without finite coordinates")
        if table.crs is not None:
            crs_in = CRS.from_user_input(table.crs)
        xcol, ycol = "x", "y"
    else:
        xcol, ycol = ("lon", "lat") if {"lon", "lat"} <= cols else ("x", "y")
        if xcol == "lon" and {"x", "y"} <= cols:
            notes.append("columns x/y not used for the position: the table has lon/lat")
        xs = _num(frame[xcol], table.decimal)
        ys = _num(frame[ycol], table.decimal)
        for col, v in ((xcol, xs), (ycol, ys)):
            raw = frame[col].to_numpy(dtype=str)
            flag(np.isnan(v) & (raw == ""), f"missing {col}")
            flag(
                np.isnan(v) & (raw != ""),
                lambda i, col=col, raw=raw: (
                    f"{col} is not a number: {show_text(raw[i])}"
                    + _comma_hint(raw[i], table.decimal)
                ),
            )
    fin = np.isfinite(xs) & np.isfinite(ys)
    if crs_in.is_geographic:
        lon, lat = xs.copy(), ys.copy()
        swapped = fin & (np.abs(lat) > 90) & (np.abs(lon) <= 90)
        flag(
            swapped,
            lambda i: (
                f"latitude {lat[i]:g} is beyond ±90 while longitude {lon[i]:g} is within: "
                "lon/lat look swapped"
            ),
        )
        wrap = fin & ~swapped & (lon > 180) & (lon <= 360) & (np.abs(lat) <= 90)
        if wrap.any():
            lon[wrap] -= 360.0
            notes.append(f"{int(wrap.sum())} longitude(s) given in 0–360 were read as −180–180")
        bad = fin & ~swapped & ((np.abs(lat) > 90) | (lon < -180) | (lon > 180))
        metres = bad & ((np.abs(xs) > 360) | (np.abs(ys) > 360))

        def _why_range(i):
            hint = ""
            if metres[i]:
                hint = (
                    f" (these look like projected metres, but the table's CRS "
                    f"{crs_in.to_string()} is in degrees: set inputs.stations_crs)"
                )
            return f"coordinates out of range: {xcol} {xs[i]:g}, {ycol} {ys[i]:g}{hint}"

        flag(bad, _why_range)
        placed = fin & ~swapped & ~bad
        unflagged = np.array([not r for r in reasons], dtype=bool)
        _flag_swapped_outliers(lon, lat, placed & unflagged, flag)
        x4326, y4326 = lon, lat
        if crs_in != CRS.from_epsg(4326):
            from pipeline.terrain import transform_points

            x4326, y4326 = transform_points(lon, lat, crs_in, "EPSG:4326")
    else:
        from pipeline.terrain import transform_points

        x4326, y4326 = transform_points(xs, ys, crs_in, "EPSG:4326")
        flag(fin & ~np.isfinite(x4326), "coordinates cannot be transformed from the table's CRS")
        # Projected coordinates that look like degrees: the CRS contradicts the numbers.
        degrees_like = fin & (np.abs(xs) <= 180) & (np.abs(ys) <= 90)
        if degrees_like.sum() > 0.5 * max(fin.sum(), 1):
            flag(
                degrees_like,
                f"x/y look like degrees but the table's CRS is projected ({crs_in.to_string()}): "
                "set inputs.stations_crs",
            )

    # --- numbers
    typed: dict[str, np.ndarray] = {}
    for c, (lo, hi) in NUMERIC_RANGES.items():
        if c not in cols:
            continue
        v = _num(frame[c], table.decimal)
        raw = frame[c].to_numpy(dtype=str)
        nonnum = np.isnan(v) & (raw != "")
        flag(
            nonnum,
            lambda i, c=c, raw=raw: (
                f"{c} is not a number: {show_text(raw[i])}" + _comma_hint(raw[i], table.decimal)
            ),
        )
        out = np.isfinite(v) & ((v < lo) | (v > hi))

        def _why(i, c=c, v=v, lo=lo, hi=hi):
            extra = ""
            if c.endswith("_aki") and lo * 10 <= v[i] <= hi * 10:
                extra = " (looks like AKI × 10)"
            elif c.endswith("_aki") and lo / 10 <= v[i] <= hi / 10:
                extra = " (looks like AKI ÷ 10)"
            elif c == "regular_share" and 1 < v[i] <= 100:
                extra = " (a percentage? give a fraction 0–1)"
            return f"{c} {v[i]:g} outside the plausible range {lo:g}–{hi:g}{extra}"

        flag(out, _why)
        typed[c] = v
    if "regular_aki" in typed:
        flag(
            np.isnan(typed["regular_aki"]) & (frame["regular_aki"] == "").to_numpy(),
            "missing regular_aki",
        )
    for grade in ("midgrade_aki", "premium_aki"):
        if grade in typed and "regular_aki" in typed:
            lower = np.isfinite(typed[grade]) & (typed[grade] < typed["regular_aki"])
            flag(
                lower,
                lambda i, g=grade: (
                    f"{g} {typed[g][i]:g} is below regular_aki {typed['regular_aki'][i]:g}"
                ),
            )
    for c in ("past_test_failures", "complaints"):
        if c in typed:
            v = typed[c]
            flag(
                np.isfinite(v) & (v != np.round(v)),
                lambda i, c=c, v=v: f"{c} {v[i]:g} is not a whole number",
            )

    dates: dict[str, list[dt.date | None]] = {}
    for c in DATE_COLUMNS:
        if c not in cols:
            continue
        raw = frame[c].to_numpy(dtype=str)
        parsed = [parse_date(r) for r in raw]
        isnone = np.array([p is None for p in parsed], dtype=bool)
        flag(
            isnone & (raw != ""),
            lambda i, c=c, raw=raw: f"{c} is not a date (YYYY-MM-DD): {show_text(raw[i])}",
        )
        future = np.array([p is not None and p > today for p in parsed], dtype=bool)
        flag(
            future,
            lambda i, c=c, parsed=parsed: (
                f"{c} {parsed[i].isoformat()} is after the run date {today.isoformat()}"
            ),
        )
        early = np.array([p is not None and p < EARLIEST_DATE for p in parsed], dtype=bool)
        flag(
            early,
            lambda i, c=c, parsed=parsed: (
                f"{c} {parsed[i].isoformat()} is before {EARLIEST_DATE.year} (a typo?)"
            ),
        )
        dates[c] = parsed

    # --- duplicates (after the row checks, among rows that are otherwise fine or not)
    ids = frame["station_id"].to_numpy(dtype=str)
    dup_mask = pd.Series(ids, dtype=object).duplicated(keep=False).to_numpy() & (ids != "")
    if dup_mask.any():
        compare = frame.drop(
            columns=[c for c in frame.columns if str(c).startswith("_")], errors="ignore"
        )
        for sid in pd.unique(ids[dup_mask]):
            members = np.flatnonzero(ids == sid)
            rows_txt = ", ".join(str(table.source_rows[m]) for m in members[:20])
            block = compare.iloc[members]
            identical = len(block.drop_duplicates()) == 1
            if identical:
                for m in members[1:]:
                    reasons[m].append(
                        f"duplicate of row {table.source_rows[members[0]]} (identical data)"
                    )
            else:
                for m in members:
                    reasons[m].append(
                        f"station_id {show_text(sid)} appears in rows {rows_txt} with "
                        "conflicting data"
                    )

    rejected_mask = np.array([bool(r) for r in reasons], dtype=bool)
    on_globe = (
        np.isfinite(x4326)
        & np.isfinite(y4326)
        & (np.abs(np.nan_to_num(x4326, nan=999.0)) <= 180)
        & (np.abs(np.nan_to_num(y4326, nan=999.0)) <= 90)
    )
    points = np.asarray(gpd.points_from_xy(x4326, y4326), dtype=object)
    geometry = np.where(on_globe, points, None)

    # accepted
    acc = pd.DataFrame({"source_row": table.source_rows})
    for c in frame.columns:
        if c in typed:
            acc[c] = typed[c]
        elif c in dates:
            acc[c] = pd.Series(
                [d.isoformat() if d is not None else None for d in dates[c]], dtype=object
            )
        else:
            acc[c] = frame[c].to_numpy(dtype=object)
    acc["lon"] = np.where(on_globe, x4326, np.nan)
    acc["lat"] = np.where(on_globe, y4326, np.nan)
    accepted = gpd.GeoDataFrame(
        acc[~rejected_mask].reset_index(drop=True),
        geometry=list(geometry[~rejected_mask]),
        crs="EPSG:4326",
    )
    rej = frame.copy()
    rej.insert(0, "source_row", table.source_rows)
    rej["reject_reason"] = ["; ".join(r) for r in reasons]
    rejected = gpd.GeoDataFrame(
        rej[rejected_mask].reset_index(drop=True),
        geometry=list(geometry[rejected_mask]),
        crs="EPSG:4326",
    )
    return IngestResult(accepted, rejected, notes)


def _comma_hint(raw: str, decimal: str) -> str:
    if decimal == "." and re.fullmatch(r"[+-]?\d+,\d+", raw.strip()):
        return " (a decimal comma? the table is read with decimal points)"
    return ""


def _flag_swapped_outliers(lon: np.ndarray, lat: np.ndarray, usable: np.ndarray, flag) -> None:
    """Reject rows far from the other stations that would lie among them with lon/lat swapped.

    Notes
    -----
    The centre is the median position of the usable rows (robust to a minority of bad rows)
    and the spread the 75th percentile of their distances to it [degrees]. A row is flagged
    when it lies farther than max(3 × spread, 1°) from the centre while its swapped position
    (lat, lon) lies within max(spread, 0.1°). Needs at least 4 usable rows; a table whose
    columns are swapped throughout is caught instead by the DEM (stations outside it).
    Plain planar distance in degrees is enough for this test (from memory; no source).
    """
    idx = np.flatnonzero(usable)
    if idx.size < 4:
        return
    c_lon = float(np.median(lon[idx]))
    c_lat = float(np.median(lat[idx]))
    d = np.hypot(lon - c_lon, lat - c_lat)
    spread = float(np.percentile(d[idx], 75))
    d_sw = np.hypot(lat - c_lon, lon - c_lat)
    far = usable & (d > max(3 * spread, 1.0))
    near_if_swapped = (np.abs(lon) <= 90) & (d_sw <= max(spread, 0.1))
    flag(
        far & near_if_swapped,
        lambda i: (
            f"lon {lon[i]:g}, lat {lat[i]:g} lies far from the other stations but among them "
            "with the two swapped: lon/lat look swapped"
        ),
    )
