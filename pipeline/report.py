"""The run report: one self-contained HTML file with embedded PNG plots (matplotlib).

Every text that comes from data is escaped with :func:`html.escape`; plots are embedded as
base64 PNG without timestamps, so the same run gives the same bytes.
"""

from __future__ import annotations

import base64
import html
import io as _io
import json
from collections.abc import Mapping, Sequence
from typing import Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

from pipeline.cautions import CAUTIONS  # noqa: E402
from pipeline.requirement import DesignDay, FleetModelParams, requirement_curve  # noqa: E402

__all__ = ["build_report_html", "requirement_figure", "decision_sections", "Section"]

_OKABE_ITO = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000")
_VERDICT_COLORS = {
    "meets_rule_and_justified": "#009E73",
    "permitted_not_justified": "#E69F00",
    "not_permitted": "#D55E00",
    "failed_field_test": "#CC79A7",
    "not_assessed": "#9e9e9e",
}


class Section:
    """A titled block of report HTML (already escaped) with an optional lead paragraph."""

    def __init__(self, title: str, body_html: str, lead: str = ""):
        self.title, self.body_html, self.lead = title, body_html, lead

    def render(self) -> str:
        lead = f"<p class='lead'>{html.escape(self.lead)}</p>" if self.lead else ""
        return f"<section><h2>{html.escape(self.title)}</h2>{lead}{self.body_html}</section>"


def _png(fig) -> str:
    buf = _io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, bbox_inches="tight", metadata={"Software": None})
    plt.close(fig)
    data = base64.b64encode(buf.getvalue()).decode("ascii")
    return f"<img class='plot' alt='' src='data:image/png;base64,{data}'>"


def requirement_figure(
    params: FleetModelParams, mix: Mapping[str, float], design: DesignDay, target_share: float
) -> str:
    """Plot: requirement [AKI] vs elevation [m] per engine class and for the fleet; PNG <img>."""
    z = np.linspace(0.0, 4000.0, 81)
    df = requirement_curve(z, params, mix, target_share, design)
    fig, ax = plt.subplots(figsize=(7.2, 4.2))
    for i, name in enumerate(params.class_names):
        ax.plot(
            df[f"{name}_target_aki"],
            z,
            color=_OKABE_ITO[i % 7],
            lw=1.6,
            label=f"{name}: {target_share:.0%} of class",
        )
        ax.plot(
            df[f"{name}_median_aki"],
            z,
            color=_OKABE_ITO[i % 7],
            lw=1.0,
            ls="--",
            label=f"{name}: median vehicle",
        )
    ax.plot(
        df["fleet_target_aki"],
        z,
        color="black",
        lw=2.6,
        label=f"fleet: {target_share:.0%} satisfied",
    )
    ax.step(
        df["fleet_posted_aki"],
        z,
        color="black",
        lw=1.0,
        ls=":",
        where="mid",
        label="fleet, rounded up as posted",
    )
    ax.set_xlabel("Octane requirement [AKI]")
    ax.set_ylabel("Elevation [m]")
    lo = float(np.nanmin(df["fleet_target_aki"])) - 8.0
    ax.set_xlim(
        max(lo, 60.0),
        float(np.nanmax(df[[c for c in df.columns if c.endswith("_aki")]].to_numpy())) + 1.0,
    )
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    ax.set_title("Requirement vs elevation on the design day", fontsize=10)
    ax.text(
        0.99,
        0.02,
        "legacy curves continue to the left (open-loop engines gain most)",
        transform=ax.transAxes,
        ha="right",
        fontsize=7,
        color="#555555",
    )
    return _png(fig)


def _verdict_figure(stations: pd.DataFrame) -> str:
    counts = stations["verdict"].value_counts()
    order = [v for v in _VERDICT_COLORS if v in counts.index]
    fig, ax = plt.subplots(figsize=(6.4, 2.6))
    ax.barh(
        order[::-1],
        [counts[v] for v in order[::-1]],
        color=[_VERDICT_COLORS[v] for v in order[::-1]],
    )
    for i, v in enumerate(order[::-1]):
        ax.text(counts[v], i, f" {counts[v]}", va="center", fontsize=8)
    ax.set_xlabel("Stations")
    ax.set_title("Stations by verdict", fontsize=10)
    return _png(fig)


def _justified_vs_posted_figure(stations: pd.DataFrame) -> str:
    fig, ax = plt.subplots(figsize=(6.4, 4.0))
    colors = [_VERDICT_COLORS.get(v, "#777777") for v in stations["verdict"]]
    ax.errorbar(
        stations["elevation_m"],
        stations["justified_aki_unrounded"],
        yerr=[
            stations["justified_aki_unrounded"] - stations["justified_aki_p05"],
            stations["justified_aki_p95"] - stations["justified_aki_unrounded"],
        ],
        fmt="none",
        ecolor="#bbbbbb",
        lw=0.7,
        zorder=1,
    )
    ax.scatter(
        stations["elevation_m"],
        stations["justified_aki_unrounded"],
        s=10,
        c="#333333",
        zorder=2,
        label="justified (unrounded) with 5–95 % band",
    )
    ax.scatter(
        stations["elevation_m"],
        stations["regular_aki"],
        s=22,
        marker="s",
        c=colors,
        edgecolors="#222222",
        linewidths=0.4,
        zorder=3,
        label="posted regular (colour: verdict)",
    )
    ax.set_xlabel("Station elevation [m]")
    ax.set_ylabel("AKI")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7, frameon=False)
    ax.set_title("Justified minimum vs posted regular", fontsize=10)
    return _png(fig)


def _whole_column(values: pd.Series) -> bool:
    """Whether a column's shown numbers are all whole or at least 1,000 (then all are shown
    without decimals); otherwise every one gets one decimal, whole and large ones too, so
    that a column mixes neither "1" with "1.0" nor "303.9" with "1,475"."""
    v = pd.to_numeric(values, errors="coerce").to_numpy(float)
    v = v[np.isfinite(v)]
    return bool(((v == np.round(v)) | (np.abs(v) >= 1000)).all())


def _table(df: pd.DataFrame, columns: Sequence[tuple[str, str]], max_rows: int = 25) -> str:
    cols = [(c, label) for c, label in columns if c in df.columns]
    head = "".join(f"<th>{html.escape(label)}</th>" for _, label in cols)
    shown = df.head(max_rows)
    whole = {c: _whole_column(shown[c]) for c, _ in cols}
    rows = []
    for _, r in shown.iterrows():
        cells = []
        for c, _ in cols:
            v = r[c]
            if v is None or (isinstance(v, float) and not np.isfinite(v)):
                s = "—"
            elif isinstance(v, float | np.floating):
                s = f"{v:,.0f}" if whole[c] else f"{v:,.1f}"
            else:
                s = str(v)
            cells.append(f"<td>{html.escape(s)}</td>")
        rows.append("<tr>" + "".join(cells) + "</tr>")
    more = (
        f"<p class='note'>… {len(df) - max_rows} more rows in the outputs.</p>"
        if len(df) > max_rows
        else ""
    )
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table>{more}"


def _corridor_figure(corridors: pd.DataFrame) -> str:
    top = corridors.sort_values("risk_l_aki_per_month", ascending=False).head(15)
    fig, ax = plt.subplots(figsize=(6.4, 3.4))
    labels = [f"edge {int(e)} · {d}" for e, d in zip(top["edge"], top["direction"], strict=True)]
    ax.barh(labels[::-1], top["risk_l_aki_per_month"].to_numpy()[::-1], color="#b5367a")
    ax.set_xlabel("Deficit risk [L·AKI/month]")
    ax.set_title("Top descent-corridor road sections by risk", fontsize=10)
    ax.tick_params(axis="y", labelsize=7)
    return _png(fig)


def decision_sections(
    *, stations: pd.DataFrame, corridors: pd.DataFrame | None, plans: Mapping[str, Any]
) -> list[Section]:
    """Report sections for the decisions: corridors, inspection priorities and plan, supply."""
    out: list[Section] = []
    if corridors is not None and len(corridors):
        cols = (
            ("edge", "Edge"),
            ("direction", "Direction"),
            ("risk_l_aki_per_month", "Risk [L·AKI/month]"),
            ("flow_l_per_month", "Sub-standard fuel [L/month]"),
            ("deficit_aki", "Deficit [AKI]"),
            ("required_aki", "Fleet needs [AKI]"),
            ("sources_count", "Sources"),
            ("length_m", "Length [m]"),
        )
        exp = stations[stations.get("export_risk_l_aki_per_month", pd.Series(dtype=float)) > 0]
        exp = exp.sort_values("export_risk_l_aki_per_month", ascending=False)
        out.append(
            Section(
                "Descent corridors",
                _corridor_figure(pd.DataFrame(corridors))
                + _table(
                    pd.DataFrame(corridors).sort_values("risk_l_aki_per_month", ascending=False),
                    cols,
                    15,
                )
                + "<h3>Stations exporting the most deficit risk</h3>"
                + _table(
                    exp,
                    (
                        ("station_id", "Station"),
                        ("name", "Name"),
                        ("elevation_m", "Elevation [m]"),
                        ("regular_aki", "Regular [AKI]"),
                        ("export_risk_l_aki_per_month", "Export risk [L·AKI/month]"),
                        ("fuel_share_in_deficit", "Share of fuel in deficit"),
                        ("corridor_required_aki", "Corridors need [AKI]"),
                    ),
                    15,
                ),
                lead="Where sub-standard regular from high stations is driven down into lowland, "
                "loaded and uphill driving: flow × fuel still in the tank × requirement deficit.",
            )
        )
    pri = plans.get("inspection_priorities")
    if pri is not None and len(pri):
        out.append(
            Section(
                "Inspection priorities",
                _table(
                    pd.DataFrame(pri),
                    (
                        ("rank", "Rank"),
                        ("station_id", "Station"),
                        ("name", "Name"),
                        ("score", "Score"),
                        ("score_verdict", "Verdict pts"),
                        ("score_deficit", "Deficit pts"),
                        ("score_export_risk", "Export pts"),
                        ("score_days_since_inspection", "Overdue pts"),
                        ("reason", "Why"),
                    ),
                    20,
                ),
                lead="Ranked by a transparent score; each component's points are shown. Weights are "
                "planning choices in the config.",
            )
        )
    plan = plans.get("inspection_plan")
    if plan is not None and len(plan):
        visits = plan[plan["kind"] == "visit"]
        days = plan.groupby("day")["cumulative_km"].max()
        out.append(
            Section(
                "Inspection plan",
                f"<p>{len(visits)} inspections over {plan['day'].nunique()} days; "
                f"{days.sum():,.0f} km driven in all.</p>"
                + _table(
                    pd.DataFrame(plan),
                    (
                        ("day", "Day"),
                        ("base_name", "Base"),
                        ("stop_order", "Stop"),
                        ("station_id", "Station"),
                        ("name", "Name"),
                        ("leg_km", "Leg [km]"),
                        ("cumulative_km", "Day total [km]"),
                        ("reason", "Why"),
                    ),
                    60,
                ),
                lead="Stations picked by priority within the budget; each day ordered into a road "
                "route from its base (exact for short days, nearest-neighbour + 2-opt otherwise).",
            )
        )
    totals = plans.get("supply_totals")
    if totals is not None and len(totals):
        sp = plans.get("supply_plan")
        raised = pd.DataFrame(sp)[pd.DataFrame(sp)["change"] == "raise"] if sp is not None else None
        body = _table(
            pd.DataFrame(totals),
            (
                ("grouping", "By"),
                ("group", "Group"),
                ("stations", "Stations"),
                ("raise", "Raise"),
                ("keep", "Keep"),
                ("regular_l_per_month", "Regular [L/month]"),
                ("raised_regular_l_per_month", "Raised [L/month]"),
                ("incremental_cost_usd_per_month", "Extra cost [USD/month]"),
            ),
            30,
        )
        if raised is not None and len(raised):
            body += "<h3>Stations to move up</h3>" + _table(
                raised.sort_values("incremental_cost_usd_per_month", ascending=False),
                (
                    ("station_id", "Station"),
                    ("name", "Name"),
                    ("regular_aki", "Today [AKI]"),
                    ("recommended_regular_aki", "Recommended [AKI]"),
                    ("driver", "Set by"),
                    ("incremental_cost_usd_per_month", "Extra cost [USD/month]"),
                ),
                40,
            )
        out.append(
            Section(
                "Grade-supply plan",
                body,
                lead="Recommended minimum regular = the higher of the station's own "
                "fleet need and what its descent corridors need; cost at the "
                "configured price per AKI per litre.",
            )
        )
    return out


_CSS = """
body{font:14px/1.45 system-ui,-apple-system,'Segoe UI',sans-serif;color:#1f2328;max-width:1040px;
margin:0 auto;padding:24px}
h1{font-size:24px;margin:0 0 4px}h2{font-size:18px;border-bottom:1px solid #d0d7de;padding-bottom:4px;
margin-top:32px}
.sub{color:#57606a;margin:0 0 16px}.lead{color:#57606a}
.cautions{background:#fff8e6;border-left:4px solid #bf8700;padding:8px 14px;margin:16px 0}
.cautions p{margin:4px 0}
table{border-collapse:collapse;width:100%;font-size:12.5px;margin:8px 0}
th,td{border-bottom:1px solid #e1e4e8;padding:3px 6px;text-align:left;vertical-align:top;
max-width:360px;overflow-wrap:anywhere}
h3{font-size:15px;margin-top:18px}
th{background:#f6f8fa;overflow-wrap:normal}.note{color:#57606a;font-size:12px}
img.plot{max-width:100%;height:auto;display:block;margin:8px 0}
pre{background:#f6f8fa;padding:10px;overflow:auto;font-size:11.5px;max-height:420px}
.kpis{display:flex;gap:12px;flex-wrap:wrap}.kpi{background:#f6f8fa;border-radius:6px;padding:8px 12px}
.kpi b{display:block;font-size:20px}
"""


def build_report_html(
    *,
    title: str,
    stations: pd.DataFrame,
    rejected: pd.DataFrame,
    params: FleetModelParams,
    default_mix: Mapping[str, float],
    design: DesignDay,
    manifest: Mapping[str, Any],
    extra_sections: Sequence[Section] = (),
    generated_note: str = "",
) -> str:
    """The whole report as one HTML string (no external references)."""
    cautions = "".join(f"<p>{html.escape(c)}</p>" for c in CAUTIONS)
    n_st, n_rj = len(stations), len(rejected)
    verdicts = stations["verdict"].value_counts() if "verdict" in stations else pd.Series(dtype=int)
    kpis = [
        ("stations assessed", f"{n_st}"),
        ("rows rejected", f"{n_rj}"),
        (
            "not fleet-justified",
            f"{int(verdicts.get('permitted_not_justified', 0) + verdicts.get('not_permitted', 0))}",
        ),
        ("failed field test", f"{int(verdicts.get('failed_field_test', 0))}"),
    ]
    kpi_html = (
        "<div class='kpis'>"
        + "".join(
            f"<div class='kpi'><b>{html.escape(v)}</b>{html.escape(k)}</div>" for k, v in kpis
        )
        + "</div>"
    )
    sections = [
        Section("Summary", kpi_html),
        Section(
            "Fleet requirement model",
            requirement_figure(params, default_mix, design, params.target_share)
            + "<p class='note'>Curves for the default fleet mix on the configured design day "
            "(standard-atmosphere pressure, temperature and humidity). Equations, defaults and "
            "sources: docs/requirement_model.md.</p>",
            lead="How the octane requirement of each engine class and of the whole fleet moves "
            "with elevation.",
        ),
        Section(
            "Stations by verdict",
            _verdict_figure(stations)
            + _table(
                stations.assign(
                    _order=stations["verdict"]
                    .map(
                        {
                            v: i
                            for i, v in enumerate(
                                (
                                    "failed_field_test",
                                    "not_permitted",
                                    "permitted_not_justified",
                                    "not_assessed",
                                    "meets_rule_and_justified",
                                )
                            )
                        }
                    )
                    .fillna(9)
                ).sort_values(["_order", "station_id"]),
                (
                    ("station_id", "Station"),
                    ("name", "Name"),
                    ("elevation_m", "Elevation [m]"),
                    ("regular_aki", "Regular [AKI]"),
                    ("justified_aki", "Justified [AKI]"),
                    ("verdict", "Verdict"),
                    ("verdict_reason", "Reason"),
                ),
                max_rows=30,
            ),
        ),
        Section("Justified minimum vs posted", _justified_vs_posted_figure(stations)),
        *extra_sections,
        Section(
            "Rejected rows",
            _table(
                rejected,
                (
                    ("source_row", "Row"),
                    ("station_id", "Station"),
                    ("name", "Name"),
                    ("reject_reason", "Why"),
                ),
                50,
            )
            if n_rj
            else "<p>None.</p>",
        ),
        Section(
            "Inputs and parameters",
            "<pre>"
            + html.escape(
                json.dumps(
                    {
                        "config": manifest.get("config"),
                        "inputs_sha256": manifest.get("inputs_sha256"),
                    },
                    indent=2,
                    default=str,
                )
            )
            + "</pre>",
        ),
    ]
    body = "".join(s.render() for s in sections)
    note = f"<p class='note'>{html.escape(generated_note)}</p>" if generated_note else ""
    return (
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
        "<meta name='viewport' content='width=device-width, initial-scale=1'>"
        f"<title>{html.escape(title)}</title><style>{_CSS}</style></head><body>"
        f"<h1>{html.escape(title)}</h1><p class='sub'>altigrade run report</p>"
        f"<div class='cautions'><b>Cautions</b>{cautions}</div>{body}"
        f"<div class='cautions'><b>Cautions</b>{cautions}</div>{note}</body></html>\n"
    )
