"""Row-level validation of the station table.

Every row read ends in exactly one of two tables: accepted stations (typed columns, point
geometry) or rejected stations (all of its original text plus a reason). Rows in = accepted +
rejected, always. Problems with the file as a whole (a required column missing) raise
:class:`~pipeline.errors.InputFileError` naming the file and the column.
"""

from __future__ import annotations

import datetime as dt
import difflib

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely
from pyproj import CRS

from pipeline.errors import InputFileError
from pipeline.io import RawTable

__all__ = [
    "REQUIRED",
    "NUMERIC_RANGES",
    "IngestResult",
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
TEXT_COLUMNS = ("station_id", "name", "operator")
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


def _num(s: pd.Series, decimal: str) -> pd.Series:
    t = s.astype(str).str.strip()
    if decimal == ",":
        t = t.str.replace(".", "", regex=False).str.replace(",", ".", regex=False)
    return pd.to_numeric(t.where(t != "", None), errors="coerce")


def _normalise_columns(frame: pd.DataFrame) -> tuple[pd.DataFrame, list[str]]:
    notes = []
    rename = {}
    lower = {c: c.strip().lower().replace(" ", "_") for c in frame.columns}
    present = set(lower.values())
    for c, lc in lower.items():
        target = ALIASES.get(lc, lc)
        if target != lc and target in present:
            continue  # both spellings present: keep the standard one
        if target != c:
            rename[c] = target
            if target != lc:
                notes.append(f"column '{c}' read as '{target}'")
    return frame.rename(columns=rename), notes


def validate_stations(
    table: RawTable, *, source: str, default_crs: str, today: dt.date
) -> IngestResult:
    """Validate a raw station table row by row.

    Parameters
    ----------
    table : RawTable as read by :func:`pipeline.io.read_station_table`
    source : file name used in messages
    default_crs : CRS of x/y or lon/lat columns of a text table
    today : the run date; dates after it are rejected

    Returns
    -------
    IngestResult with ``accepted`` in EPSG:4326 (columns typed, ``source_row`` kept) and
    ``rejected`` (all original columns as text, ``source_row``, ``reject_reason``, geometry
    where the coordinates could be read).
    """
    frame, notes = _normalise_columns(table.frame.copy())
    cols = set(frame.columns)
    have_geom = table.geometry is not None
    missing = [c for c in REQUIRED if c not in cols]
    if not have_geom and not ({"lon", "lat"} <= cols or {"x", "y"} <= cols):
        missing.append("lon/lat (or x/y)")
    if missing:
        hints = []
        for m in missing:
            close = difflib.get_close_matches(m.split("/")[0], list(frame.columns), n=1, cutoff=0.6)
            if close:
                hints.append(f"'{m}' (is '{close[0]}' meant?)")
            else:
                hints.append(f"'{m}'")
        raise InputFileError(
            f"{source}: missing required column(s) {', '.join(hints)}; "
            f"found columns: {', '.join(map(str, frame.columns)) or 'none'}"
        )
    n = len(frame)
    reasons: list[list[str]] = [[] for _ in range(n)]

    def flag(mask: np.ndarray, msg) -> None:
        for i in np.flatnonzero(mask):
            reasons[i].append(msg(i) if callable(msg) else msg)

    for c in TEXT_COLUMNS:
        if c in cols:
            frame[c] = frame[c].astype(str).str.strip()
    flag((frame["station_id"] == "").to_numpy(), "empty station_id")
    flag((frame["name"] == "").to_numpy(), "empty name")

    # --- position
    crs_in = CRS.from_user_input(default_crs)
    lon = lat = None
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
        crs_in = CRS.from_user_input(table.crs) if table.crs is not None else crs_in
    else:
        xcol, ycol = ("lon", "lat") if {"lon", "lat"} <= cols else ("x", "y")
        xs = _num(frame[xcol], table.decimal).to_numpy(dtype=float)
        ys = _num(frame[ycol], table.decimal).to_numpy(dtype=float)
        bad_x = np.isnan(xs)
        bad_y = np.isnan(ys)
        flag(bad_x & (frame[xcol] == "").to_numpy(), f"missing {xcol}")
        flag(
            bad_x & (frame[xcol] != "").to_numpy(),
            lambda i: f"{xcol} is not a number: {frame[xcol].iloc[i]!r}",
        )
        flag(bad_y & (frame[ycol] == "").to_numpy(), f"missing {ycol}")
        flag(
            bad_y & (frame[ycol] != "").to_numpy(),
            lambda i: f"{ycol} is not a number: {frame[ycol].iloc[i]!r}",
        )
    if crs_in.is_geographic:
        lon, lat = xs.copy(), ys.copy()
        fin = np.isfinite(lon) & np.isfinite(lat)
        swapped = fin & (np.abs(lat) > 90) & (np.abs(lon) <= 90)
        flag(
            swapped,
            lambda i: (
                f"latitude {lat[i]:g} is beyond ±90 while longitude {lon[i]:g} is within: lon/lat look swapped"
            ),
        )
        wrap = fin & ~swapped & (lon > 180) & (lon <= 360) & (np.abs(lat) <= 90)
        if wrap.any():
            lon[wrap] -= 360.0
            notes.append(f"{int(wrap.sum())} longitude(s) given in 0–360 were read as −180–180")
        bad = fin & ~swapped & ((np.abs(lat) > 90) | (lon < -180) | (lon > 180))
        flag(bad, lambda i: f"coordinates out of range: lon {xs[i]:g}, lat {ys[i]:g}")
        x4326, y4326 = lon, lat
        if crs_in != CRS.from_epsg(4326):
            from pipeline.terrain import transform_points

            x4326, y4326 = transform_points(lon, lat, crs_in, "EPSG:4326")
    else:
        from pipeline.terrain import transform_points

        x4326, y4326 = transform_points(xs, ys, crs_in, "EPSG:4326")
        fin = np.isfinite(xs) & np.isfinite(ys)
        flag(fin & ~np.isfinite(x4326), "coordinates cannot be transformed from the table's CRS")
        # Projected coordinates that look like degrees: the CRS contradicts the numbers.
        degrees_like = fin & (np.abs(xs) <= 180) & (np.abs(ys) <= 90)
        if degrees_like.sum() > 0.5 * max(fin.sum(), 1):
            flag(
                degrees_like,
                f"x/y look like degrees but the table's CRS is projected ({crs_in.to_string()})",
            )

    # --- numbers
    typed: dict[str, np.ndarray] = {}
    for c, (lo, hi) in NUMERIC_RANGES.items():
        if c not in cols:
            continue
        v = _num(frame[c], table.decimal).to_numpy(dtype=float)
        raw = frame[c].astype(str).to_numpy()
        nonnum = np.isnan(v) & (raw != "")
        flag(nonnum, lambda i, c=c, raw=raw: f"{c} is not a number: {raw[i]!r}")
        out = np.isfinite(v) & ((v < lo) | (v > hi))

        def _why(i, c=c, v=v, lo=lo, hi=hi):
            extra = ""
            if c.endswith("_aki") and lo * 10 <= v[i] <= hi * 10:
                extra = " (looks like AKI × 10)"
            elif c.endswith("_aki") and lo / 10 <= v[i] <= hi / 10:
                extra = " (looks like AKI ÷ 10)"
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

    dates: dict[str, pd.Series] = {}
    for c in DATE_COLUMNS:
        if c not in cols:
            continue
        raw = frame[c].astype(str)
        parsed = pd.to_datetime(raw.where(raw != "", None), errors="coerce", format="ISO8601")
        badd = parsed.isna().to_numpy() & (raw != "").to_numpy()
        flag(badd, lambda i, c=c, raw=raw: f"{c} is not a date (YYYY-MM-DD): {raw.iloc[i]!r}")
        future = (parsed > pd.Timestamp(today)).fillna(False).to_numpy(dtype=bool)
        flag(
            future,
            lambda i, c=c, raw=raw: f"{c} {raw.iloc[i]} is after the run date {today.isoformat()}",
        )
        dates[c] = parsed

    # --- duplicates (after the row checks, among rows that are otherwise fine or not)
    ids = frame["station_id"].to_numpy()
    dup_mask = pd.Series(ids).duplicated(keep=False).to_numpy() & (ids != "")
    if dup_mask.any():
        compare = frame.drop(
            columns=[c for c in frame.columns if c.startswith("_")], errors="ignore"
        )
        for sid in pd.unique(ids[dup_mask]):
            members = np.flatnonzero(ids == sid)
            rows_txt = ", ".join(str(table.source_rows[m]) for m in members)
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
                        f"station_id {sid!r} appears in rows {rows_txt} with conflicting data"
                    )

    rejected_mask = np.array([bool(r) for r in reasons], dtype=bool)
    geometry = gpd.points_from_xy(x4326, y4326)
    geometry = np.where(np.isfinite(x4326) & np.isfinite(y4326), geometry, None)

    # accepted
    acc = pd.DataFrame({"source_row": table.source_rows})
    for c in frame.columns:
        if c in typed:
            acc[c] = typed[c]
        elif c in dates:
            acc[c] = dates[c].dt.strftime("%Y-%m-%d").where(dates[c].notna(), None)
        else:
            acc[c] = frame[c]
    acc["lon"] = x4326
    acc["lat"] = y4326
    for c in ("x", "y"):
        if c in acc.columns and c in typed:
            pass
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
