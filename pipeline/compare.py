"""Compare two runs: what changes between, e.g., today's rule and a proposed one, or a fleet shift.

Pure functions over the two runs' station tables (and grade-supply plans where present); the CLI
(`altigrade compare RUN_A RUN_B`) reads the runs' GeoPackages and writes the comparison.
"""

from __future__ import annotations

from dataclasses import dataclass

import geopandas as gpd
import numpy as np
import pandas as pd

__all__ = ["Comparison", "compare_runs", "COMPARED_COLUMNS"]

#: Columns whose totals over all stations mean something (flows of money and risk).
ADDITIVE_COLUMNS = ("incremental_cost_usd_per_month", "export_risk_l_aki_per_month")

#: Station columns compared between the runs, with the label used in reports.
COMPARED_COLUMNS = (
    ("verdict", "Verdict"),
    ("justified_aki", "Justified [AKI]"),
    ("recommended_regular_aki", "Recommended regular [AKI]"),
    ("regular_change", "Supply change"),
    ("incremental_cost_usd_per_month", "Incremental cost [USD/month]"),
    ("priority_score", "Inspection priority score"),
    ("export_risk_l_aki_per_month", "Corridor risk [L·AKI/month]"),
)


@dataclass(frozen=True)
class Comparison:
    """Result of :func:`compare_runs`.

    Attributes
    ----------
    stations : GeoDataFrame — one row per station in either run: ``station_id``, ``name``,
        ``presence`` (both / only_a / only_b), ``<col>_a``, ``<col>_b`` for each compared column,
        ``changed`` (bool), ``change`` (one line naming what changed)
    verdict_matrix : DataFrame — counts, verdict in A (rows) × verdict in B (columns)
    totals : DataFrame — per compared numeric column: total in A, in B, and the difference
    """

    stations: gpd.GeoDataFrame
    verdict_matrix: pd.DataFrame
    totals: pd.DataFrame


def _fmt(v) -> str:
    if v is None or (isinstance(v, float) and not np.isfinite(v)):
        return "—"
    if isinstance(v, float | np.floating):
        return f"{v:,.0f}" if float(v).is_integer() or abs(v) >= 1000 else f"{v:,.1f}"
    return str(v)


def compare_runs(
    a: gpd.GeoDataFrame, b: gpd.GeoDataFrame, *, tolerance: float = 1e-6
) -> Comparison:
    """Station-by-station differences between run A and run B (matched on ``station_id``).

    Numeric columns count as changed when they differ by more than ``tolerance``; a missing
    value on one side and a value on the other counts as a change.
    """
    cols = [c for c, _ in COMPARED_COLUMNS if c in a.columns or c in b.columns]
    keep = ["station_id", "name", "geometry"]
    aa = a[[c for c in keep + cols if c in a.columns]].copy()
    bb = b[[c for c in keep + cols if c in b.columns]].copy()
    m = pd.merge(
        pd.DataFrame(aa),
        pd.DataFrame(bb),
        on="station_id",
        how="outer",
        suffixes=("_a", "_b"),
        indicator=True,
    )
    m["presence"] = m["_merge"].map({"both": "both", "left_only": "only_a", "right_only": "only_b"})
    m = m.drop(columns="_merge")
    m["name"] = m["name_a"].where(m["name_a"].notna(), m.get("name_b"))
    geom = m["geometry_a"].where(m["geometry_a"].notna(), m.get("geometry_b"))
    changed = m["presence"] != "both"
    notes: list[list[str]] = [
        [] if p == "both" else [f"station {p.replace('_', ' in run ')}"] for p in m["presence"]
    ]
    labels = dict(COMPARED_COLUMNS)
    for c in cols:
        ca, cb = f"{c}_a", f"{c}_b"
        if ca not in m:
            m[ca] = np.nan
        if cb not in m:
            m[cb] = np.nan
        va, vb = m[ca], m[cb]
        if pd.api.types.is_numeric_dtype(va) and pd.api.types.is_numeric_dtype(vb):
            x, y = va.to_numpy(float), vb.to_numpy(float)
            with np.errstate(invalid="ignore"):
                diff = (np.abs(x - y) > tolerance) | (np.isnan(x) != np.isnan(y))
        else:
            diff = (va.astype(str) != vb.astype(str)).to_numpy()
        diff = np.asarray(diff, dtype=bool) & (m["presence"] == "both").to_numpy()
        changed |= diff
        for i in np.flatnonzero(diff):
            notes[i].append(f"{labels[c]}: {_fmt(va.iloc[i])} → {_fmt(vb.iloc[i])}")
    m["changed"] = changed.to_numpy()
    m["change"] = ["; ".join(n) for n in notes]
    out_cols = ["station_id", "name", "presence", "changed", "change"] + [
        f"{c}_{s}" for c in cols for s in ("a", "b")
    ]
    stations = gpd.GeoDataFrame(
        m[out_cols].reset_index(drop=True), geometry=list(geom), crs=a.crs or b.crs
    )
    stations = stations.sort_values(
        ["changed", "station_id"], ascending=[False, True], kind="stable"
    ).reset_index(drop=True)
    if "verdict_a" in m and "verdict_b" in m:
        both = m[m["presence"] == "both"]
        vm = pd.crosstab(both["verdict_a"].fillna("—"), both["verdict_b"].fillna("—"))
    else:
        vm = pd.DataFrame()
    rows = []
    for c in cols:
        ca, cb = f"{c}_a", f"{c}_b"
        if c in ADDITIVE_COLUMNS:
            ta, tb = float(np.nansum(m[ca])), float(np.nansum(m[cb]))
            rows.append({"quantity": labels[c], "run_a": ta, "run_b": tb, "difference": tb - ta})
    for col, value, label in (
        ("verdict", "meets_rule_and_justified", "Stations meeting rule and fleet"),
        ("verdict", "not_permitted", "Stations not permitted"),
        ("verdict", "permitted_not_justified", "Stations permitted, not justified"),
        ("regular_change", "raise", "Stations to raise their regular"),
    ):
        if f"{col}_a" in m and f"{col}_b" in m:
            ta, tb = float((m[f"{col}_a"] == value).sum()), float((m[f"{col}_b"] == value).sum())
            rows.append({"quantity": label, "run_a": ta, "run_b": tb, "difference": tb - ta})
    totals = pd.DataFrame(rows, columns=["quantity", "run_a", "run_b", "difference"])
    return Comparison(stations=stations, verdict_matrix=vm, totals=totals)


def read_run(folder) -> gpd.GeoDataFrame:
    """The ``stations`` layer of a finished run folder."""
    from pathlib import Path

    import pyogrio

    from pipeline.errors import InputFileError

    gpkg = Path(folder) / "altigrade.gpkg"
    if not gpkg.is_file():
        raise InputFileError(f"{folder}: not an altigrade run folder (no altigrade.gpkg)")
    try:
        return pyogrio.read_dataframe(gpkg, layer="stations")
    except Exception as exc:
        raise InputFileError(f"{gpkg}: cannot read layer 'stations' ({exc})") from None


def comparison_report_html(cmp: Comparison, name_a: str, name_b: str) -> str:
    """A self-contained HTML page summarising a comparison (cautions included)."""
    import html as _html

    from pipeline.cautions import CAUTIONS
    from pipeline.report import _CSS, _table

    cautions = "".join(f"<p>{_html.escape(c)}</p>" for c in CAUTIONS)
    changed = cmp.stations[cmp.stations["changed"]]
    vm = cmp.verdict_matrix
    if len(vm):
        head = "".join(f"<th>{_html.escape(str(c))}</th>" for c in vm.columns)
        rows = "".join(
            f"<tr><th>{_html.escape(str(i))}</th>"
            + "".join(f"<td>{int(v)}</td>" for v in r)
            + "</tr>"
            for i, r in vm.iterrows()
        )
        matrix = (
            f"<table><thead><tr><th>run A ↓ · run B →</th>{head}</tr></thead><tbody>{rows}</tbody>"
            "</table>"
        )
    else:
        matrix = "<p>No verdicts to compare.</p>"
    cols = [
        ("station_id", "Station"),
        ("name", "Name"),
        ("presence", "In"),
        ("change", "What changes"),
    ]
    t = _html.escape
    return (
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
        f"<title>Comparison {t(name_a)} → {t(name_b)}</title><style>{_CSS}</style></head><body>"
        f"<h1>What changes from {t(name_a)} to {t(name_b)}</h1>"
        f"<div class='cautions'><b>Cautions</b>{cautions}</div>"
        f"<section><h2>Summary</h2><p>{int(changed.shape[0])} of {len(cmp.stations)} stations "
        "change.</p>"
        + _table(
            cmp.totals,
            (
                ("quantity", "Quantity"),
                ("run_a", f"Run A ({name_a})"),
                ("run_b", f"Run B ({name_b})"),
                ("difference", "B − A"),
            ),
            20,
        )
        + "</section><section><h2>Verdicts, run A (rows) by run B (columns)</h2>"
        + matrix
        + "</section><section><h2>Stations that change</h2>"
        + _table(changed, cols, 300)
        + f"</section><div class='cautions'><b>Cautions</b>{cautions}</div></body></html>\n"
    )
