"""Inspection priorities and day-by-day inspection plans for fuel-quality regulators.

A pure calculation module (it never opens files). Two steps:

1. :func:`inspection_priorities` — a transparent priority score per station, 0–100 points,
   the sum of seven component contributions, each a documented 0–1 transform of one input
   times a configurable weight (:class:`PriorityWeights`), with a one-line plain-English
   reason naming the largest contributions and their numbers.
2. :func:`plan_inspections` — stations picked by priority within a budget (inspections per
   day × days, optionally a daily driving limit), each assigned to its nearest inspector base
   by road, grouped into days and ordered into routes on the road graph
   (:class:`pipeline.roadgraph.RoadGraph`): a CSV-ready itinerary, one LineString per day and
   the list of stations left out, each with its reason. No station is dropped silently.

Score components (``score_<name>`` columns; defaults are invented planning choices)
-------------------------------------------------------------------------------------
| component | input | transform n ∈ [0, 1] | weight |
|---|---|---|---|
| ``verdict`` | ``verdict`` | factor per verdict (:data:`DEFAULT_VERDICT_FACTORS`) | 30 |
| ``deficit`` | Δ = justified − posted [AKI] | min(max(0, Δ) / ``deficit_cap_aki``, 1) | 20 |
| ``export_risk`` | r [L·AKI/month] | min(r / r_ref, 1) or log1p(r) / log1p(r_ref) | 15 |
| ``volume`` | V [L/month] | min(V / V_ref, 1) | 10 |
| ``days_since_inspection`` | days [d] | min(days / cap, 1); none → ``never_inspected_days`` | 15 |
| ``past_failures`` | ``past_test_failures`` | min(count / cap, 1) | 5 |
| ``complaints`` | ``complaints`` | min(count / cap, 1) | 5 |

Inputs: Δ from ``justified_aki`` and ``regular_aki``; r from ``export_risk_l_aki_per_month``
(:data:`EXPORT_RISK_COLUMNS`); V from ``volume_l_per_month``; days from
``last_inspection_date`` to the given ``today``.
r_ref, V_ref: a configured cap, or (default) the 95th percentile (linear interpolation) of the
table's values, zeros included: the top 5 % earn the full weight and one outlier does not
flatten the rest; where that percentile is 0 (fewer than about 5 % of stations export at all)
every positive value earns the full weight. The percentile never falls when one value rises,
so raising one station's input never raises another station's contribution.
Missing inputs (NaN, absent column) give n = 0, except a missing verdict (→ ``not_assessed``)
and a missing inspection date (→ ``never_inspected_days``). Weights are relative: they are
rescaled to total 100 points (the defaults already do), so

    score = Σ_c 100 · w_c / Σ_k w_k · n_c      ∈ [0, 100].

Routing (per inspection day: one base, up to ``inspections_per_day`` stops)
-------------------------------------------------------------------------
Road distances between the day's stops and its base come from
``scipy.sparse.csgraph.dijkstra`` started at those few nodes only (directed: one-way edges are
respected, so the matrix may be asymmetric). The visiting order is exact (Held–Karp dynamic
programming, :func:`exact_tour`) up to ``exact_max_stops`` stops and otherwise a
nearest-neighbour tour improved by best-improvement 2-opt (:func:`nearest_neighbour_tour`,
:func:`two_opt`); the 2-opt move is evaluated exactly for asymmetric matrices (the reversed
stretch is costed in its new direction). Day geometries follow the shortest paths,
reconstructed from the dijkstra predecessors edge by edge.

A planning aid: inspection priorities are a ranking for planning, not findings. Follow the
vehicle maker's fuel recommendation; defer to local fuel regulations and licensed practice.

References
----------
Dijkstra, E. W. (1959), Numerische Mathematik 1, 269–271 (scipy.sparse.csgraph).
Held, M. and Karp, R. M. (1962), "A dynamic programming approach to sequencing problems",
J. SIAM 10, 196–210 (exact tour).
Croes, G. A. (1958), "A method for solving traveling-salesman problems", Operations Research 6,
791–812 (2-opt; from memory).
Rosenkrantz, D. J., Stearns, R. E. and Lewis, P. M. (1977), "An analysis of several heuristics
for the traveling salesman problem", SIAM J. Computing 6, 563–581 (nearest neighbour; from
memory).
Gillett, B. E. and Miller, L. R. (1974), "A heuristic algorithm for the vehicle-dispatch
problem", Operations Research 22, 340–349 (sweep grouping of stops into days; from memory).
"""

from __future__ import annotations

import datetime as dt
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, Literal

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely
from numpy.typing import ArrayLike
from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator
from pyproj import CRS
from scipy.sparse.csgraph import dijkstra

from pipeline.compliance import VERDICTS
from pipeline.errors import AltigradeError
from pipeline.roadgraph import RoadGraph, snap_points
from pipeline.terrain import transform_points

__all__ = [
    "InspectionError",
    "SCORE_COMPONENTS",
    "EXPORT_RISK_COLUMNS",
    "DEFAULT_VERDICT_FACTORS",
    "UNPLANNED_STATUSES",
    "PriorityWeights",
    "InspectionPlanParams",
    "InspectionPlan",
    "normalised_components",
    "inspection_priorities",
    "road_distance_matrix",
    "tour_length",
    "nearest_neighbour_tour",
    "two_opt",
    "exact_tour",
    "order_stops",
    "plan_inspections",
]

#: Score components, in column order (``score_<name>``).
SCORE_COMPONENTS = (
    "verdict",
    "deficit",
    "export_risk",
    "volume",
    "days_since_inspection",
    "past_failures",
    "complaints",
)

#: Station-table columns read as the export risk [L·AKI/month], first present wins (the
#: corridors stage writes the first; the second is accepted as a short alias).
EXPORT_RISK_COLUMNS = ("export_risk_l_aki_per_month", "export_risk")

#: Verdict factor n ∈ [0, 1] (invented planning choice, not from any source): a failed field
#: test is a finding already; a grade the rule does not permit comes next; a permitted but
#: unjustified grade is a fleet-protection concern; a station not assessed is unknown risk.
DEFAULT_VERDICT_FACTORS: dict[str, float] = {
    "failed_field_test": 1.0,
    "not_permitted": 0.9,
    "permitted_not_justified": 0.6,
    "not_assessed": 0.4,
    "meets_rule_and_justified": 0.0,
}

#: Why a station is not in the plan (``unplanned.status``).
UNPLANNED_STATUSES = (
    "no_position",
    "off_network",
    "unreachable",
    "over_daily_limit",
    "below_threshold",
    "over_budget",
)

_M_PER_KM = 1000.0
_NO_PRED = -9999  # scipy.sparse.csgraph's "no predecessor" marker


class InspectionError(AltigradeError, ValueError):
    """Inputs to the inspection score or plan are unusable (missing columns, bad bases)."""


# ----------------------------------------------------------------------------------------------
# Parameters
# ----------------------------------------------------------------------------------------------


class PriorityWeights(BaseModel):
    """Weights and transforms of the inspection priority score.

    Every default is an invented planning choice (not from any source): tune them to the
    regulator's own priorities. Weights are relative and rescaled to total 100 points; the
    defaults total 100, so with them a contribution is simply weight × n.
    """

    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=False)

    weight_verdict: float = Field(30.0, ge=0, description="Weight of the verdict [points].")
    weight_deficit: float = Field(
        20.0, ge=0, description="Weight of the fleet deficit (justified − posted) [points]."
    )
    weight_export_risk: float = Field(
        15.0, ge=0, description="Weight of the descent-corridor export risk [points]."
    )
    weight_volume: float = Field(10.0, ge=0, description="Weight of the volume sold [points].")
    weight_days_since_inspection: float = Field(
        15.0, ge=0, description="Weight of the time since the last inspection [points]."
    )
    weight_past_failures: float = Field(
        5.0, ge=0, description="Weight of past field-test failures [points]."
    )
    weight_complaints: float = Field(
        5.0, ge=0, description="Weight of consumer complaints [points]."
    )
    verdict_factors: dict[str, float] = Field(
        default_factory=lambda: dict(DEFAULT_VERDICT_FACTORS),
        description="Factor 0–1 per verdict; verdicts not named keep their default factor.",
    )
    deficit_cap_aki: float = Field(
        2.0, gt=0, description="Deficit that earns the full deficit weight [AKI]."
    )
    export_risk_scale: Literal["linear", "log"] = Field(
        "linear",
        description="'linear': r / r_ref; 'log': log1p(r) / log1p(r_ref) (both capped at 1).",
    )
    export_risk_cap_l_aki_per_month: float | None = Field(
        None,
        gt=0,
        description="Export risk earning the full weight [L·AKI/month]; default: the "
        "reference quantile of the table's values.",
    )
    volume_cap_l_per_month: float | None = Field(
        None,
        gt=0,
        description="Volume earning the full weight [L/month]; default: the reference "
        "quantile of the table's volumes.",
    )
    reference_quantile: float = Field(
        0.95, gt=0, le=1, description="Quantile used where a cap is not set [0–1]."
    )
    inspection_interval_cap_days: float = Field(
        1095.0, gt=0, description="Days since the last inspection earning the full weight [d]."
    )
    never_inspected_days: float = Field(
        1095.0, ge=0, description="Days assumed for a station with no inspection on record [d]."
    )
    past_failures_cap_count: float = Field(
        2.0, gt=0, description="Past field-test failures earning the full weight [count]."
    )
    complaints_cap_count: float = Field(
        5.0, gt=0, description="Complaints earning the full weight [count]."
    )
    reason_top_n: int = Field(
        3, ge=1, le=len(SCORE_COMPONENTS), description="Contributions named in the reason."
    )

    @field_validator("verdict_factors")
    @classmethod
    def _verdicts(cls, v: dict[str, float]) -> dict[str, float]:
        bad = [k for k in v if k not in VERDICTS]
        if bad:
            raise ValueError(f"unknown verdicts {bad}; valid: {', '.join(VERDICTS)}")
        out = {**DEFAULT_VERDICT_FACTORS, **{k: float(x) for k, x in v.items()}}
        off = [k for k, x in out.items() if not 0.0 <= x <= 1.0]
        if off:
            raise ValueError(f"verdict factors must lie in 0…1 (not: {off})")
        return out

    @model_validator(mode="after")
    def _total(self) -> PriorityWeights:
        if not self.total_weight > 0:
            raise ValueError("at least one weight must be > 0")
        return self

    def weight(self, component: str) -> float:
        """Configured weight of a component (see :data:`SCORE_COMPONENTS`) [points]."""
        return float(getattr(self, f"weight_{component}"))

    @property
    def total_weight(self) -> float:
        """Sum of the configured weights [points]."""
        return float(sum(self.weight(c) for c in SCORE_COMPONENTS))


class InspectionPlanParams(BaseModel):
    """Budget and routing options of an inspection plan (defaults: invented planning choices)."""

    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=False)

    inspections_per_day: int = Field(6, ge=1, description="Stations one team visits a day.")
    days: int = Field(5, ge=1, description="Inspection days in the plan (all bases together).")
    max_daily_km: float | None = Field(
        None, gt=0, description="Longest day's drive, base to base [km]; None: no limit."
    )
    return_to_base: bool = Field(True, description="Each day ends back at its base.")
    max_snap_distance_m: float = Field(
        1000.0, gt=0, description="Farthest a station or base may lie from a road [m]."
    )
    min_score: float = Field(
        0.0, ge=0, description="Only stations scoring above this are planned [points]."
    )
    exact_max_stops: int = Field(
        10, ge=0, le=14, description="Days with up to this many stops are ordered exactly."
    )


# ----------------------------------------------------------------------------------------------
# Priority score
# ----------------------------------------------------------------------------------------------


def _num(df: pd.DataFrame, col: str) -> np.ndarray:
    if col not in df.columns:
        return np.full(len(df), np.nan)
    return pd.to_numeric(df[col], errors="coerce").to_numpy(dtype=float)


def _ref_value(values: np.ndarray, cap: float | None, q: float) -> float:
    """The value earning full weight: the cap, or the q-quantile (linear interpolation) of the
    table's values, negatives as 0, zeros included; NaN when there is no value at all."""
    if cap is not None:
        return float(cap)
    v = values[np.isfinite(values)]
    return float(np.quantile(np.maximum(v, 0.0), q)) if v.size else math.nan


def _ratio(values: np.ndarray, ref: float) -> np.ndarray:
    """min(max(v, 0) / ref, 1); 0 where v is NaN or ref is NaN; for ref = 0 (fewer positive
    values than the top quantile holds) every positive value earns 1."""
    v = np.where(np.isfinite(values), np.maximum(values, 0.0), 0.0)
    if not np.isfinite(ref):
        return np.zeros_like(v)
    if ref <= 0:
        return (v > 0).astype(float)
    return np.minimum(v / ref, 1.0)


def _days_since(values: pd.Series | None, n: int, today: dt.date) -> np.ndarray:
    """Whole days from each ISO date to ``today`` (NaN where missing or unparseable; ≥ 0)."""
    if values is None:
        return np.full(n, np.nan)
    text = values.astype(object).map(lambda v: str(v) if pd.notna(v) and str(v).strip() else None)
    ts = pd.to_datetime(text, errors="coerce", format="ISO8601")
    day = pd.Timestamp(today)
    days = (day - ts.dt.normalize()).dt.days.to_numpy(dtype=float, na_value=np.nan)
    return np.where(np.isfinite(days), np.maximum(days, 0.0), np.nan)


def normalised_components(
    stations: pd.DataFrame, weights: PriorityWeights, *, today: dt.date
) -> pd.DataFrame:
    """The seven score components as 0–1 values, with the raw inputs behind them.

    Parameters
    ----------
    stations : DataFrame
        Station table. Required: ``station_id``, ``verdict`` (one of
        :data:`pipeline.compliance.VERDICTS`; blank → ``not_assessed``). Optional (absent or
        NaN → component 0): ``regular_aki``, ``justified_aki`` [AKI], an export-risk column
        (:data:`EXPORT_RISK_COLUMNS`) [L·AKI/month], ``volume_l_per_month`` [L/month],
        ``last_inspection_date`` (ISO date; blank → never inspected), ``past_test_failures``,
        ``complaints`` [count], ``field_test_aki`` [AKI] (quoted in reasons).
    weights : PriorityWeights
    today : datetime.date
        Reference day for the days since the last inspection.

    Returns
    -------
    DataFrame on the same index: ``n_<component>`` ∈ [0, 1] for each of
    :data:`SCORE_COMPONENTS`, and the raw values ``verdict``, ``deficit_aki`` [AKI],
    ``export_risk_l_aki_per_month``, ``volume_l_per_month``, ``days_since_inspection`` [d]
    (NaN: never inspected), ``past_test_failures``, ``complaints`` [count]. ``attrs`` holds
    the reference values used (``export_risk_ref_l_aki_per_month``,
    ``volume_ref_l_per_month``) and ``absent_inputs`` (components whose column is missing).

    Notes
    -----
    See the module table. The deficit uses the posted justified AKI (rounded up to the
    posting step), so it is a whole number of steps when the posted grade is on the grid.

    Raises
    ------
    InspectionError
        ``station_id`` or ``verdict`` missing, or a verdict not in ``VERDICTS``.
    """
    for col in ("station_id", "verdict"):
        if col not in stations.columns:
            raise InspectionError(
                f"station table lacks column {col!r} "
                f"(have: {', '.join(map(str, stations.columns))})"
            )
    n = len(stations)
    absent: list[str] = []

    verdict = stations["verdict"].astype(object).where(stations["verdict"].notna(), None)
    verdict = verdict.map(lambda v: "not_assessed" if v is None or str(v).strip() == "" else str(v))
    unknown = sorted(set(verdict) - set(VERDICTS))
    if unknown:
        raise InspectionError(f"unknown verdicts {unknown}; valid: {', '.join(VERDICTS)}")
    n_verdict = verdict.map(weights.verdict_factors).to_numpy(dtype=float)

    posted = _num(stations, "regular_aki")
    just = _num(stations, "justified_aki")
    if "regular_aki" not in stations.columns or "justified_aki" not in stations.columns:
        absent.append("deficit")
    with np.errstate(invalid="ignore"):
        deficit = np.where(
            np.isfinite(posted) & np.isfinite(just), np.maximum(just - posted, 0), np.nan
        )
    n_deficit = _ratio(deficit, weights.deficit_cap_aki)

    risk_col = next((c for c in EXPORT_RISK_COLUMNS if c in stations.columns), None)
    if risk_col is None:
        absent.append("export_risk")
        risk = np.full(n, np.nan)
    else:
        risk = _num(stations, risk_col)
    r_ref = _ref_value(risk, weights.export_risk_cap_l_aki_per_month, weights.reference_quantile)
    if weights.export_risk_scale == "log" and np.isfinite(r_ref) and r_ref > 0:
        r = np.where(np.isfinite(risk), np.maximum(risk, 0.0), 0.0)
        n_risk = np.minimum(np.log1p(r) / np.log1p(r_ref), 1.0)
    else:
        n_risk = _ratio(risk, r_ref)

    vol = _num(stations, "volume_l_per_month")
    if "volume_l_per_month" not in stations.columns:
        absent.append("volume")
    v_ref = _ref_value(vol, weights.volume_cap_l_per_month, weights.reference_quantile)
    n_vol = _ratio(vol, v_ref)

    col = stations["last_inspection_date"] if "last_inspection_date" in stations.columns else None
    days = _days_since(col, n, today)
    eff_days = np.where(np.isfinite(days), days, weights.never_inspected_days)
    n_days = _ratio(eff_days, weights.inspection_interval_cap_days)

    fails = _num(stations, "past_test_failures")
    if "past_test_failures" not in stations.columns:
        absent.append("past_failures")
    n_fail = _ratio(fails, weights.past_failures_cap_count)
    compl = _num(stations, "complaints")
    if "complaints" not in stations.columns:
        absent.append("complaints")
    n_compl = _ratio(compl, weights.complaints_cap_count)

    out = pd.DataFrame(
        {
            "n_verdict": n_verdict,
            "n_deficit": n_deficit,
            "n_export_risk": n_risk,
            "n_volume": n_vol,
            "n_days_since_inspection": n_days,
            "n_past_failures": n_fail,
            "n_complaints": n_compl,
            "verdict": verdict.to_numpy(dtype=object),
            "regular_aki": posted,
            "justified_aki": just,
            "field_test_aki": _num(stations, "field_test_aki"),
            "deficit_aki": deficit,
            "export_risk_l_aki_per_month": risk,
            "volume_l_per_month": vol,
            "days_since_inspection": days,
            "past_test_failures": fails,
            "complaints": compl,
        },
        index=stations.index,
    )
    out.attrs.update(
        export_risk_ref_l_aki_per_month=r_ref,
        volume_ref_l_per_month=v_ref,
        export_risk_column=risk_col,
        absent_inputs=absent,
    )
    return out


def _aki(x: float) -> str:
    return f"{x:.1f}".rstrip("0").rstrip(".")


def _sig3(x: float) -> str:
    """Three significant figures with thousands separators (12,345 → '12,300')."""
    if x == 0 or not np.isfinite(x):
        return "0"
    d = 2 - int(math.floor(math.log10(abs(x))))
    v = round(x, d)
    return f"{v:,.{max(d, 0)}f}"


def _phrase(component: str, row: Mapping[str, Any]) -> str:
    """Plain-English phrase for one component of one station."""
    if component == "verdict":
        v = row["verdict"]
        if v == "failed_field_test":
            if np.isfinite(row["field_test_aki"]) and np.isfinite(row["regular_aki"]):
                return (
                    f"failed field test ({_aki(row['field_test_aki'])} tested vs "
                    f"{_aki(row['regular_aki'])} AKI posted)"
                )
            return "failed field test"
        return {
            "not_permitted": "posted grade not permitted by the rule",
            "permitted_not_justified": "permitted but below the fleet's need",
            "not_assessed": "compliance not assessed (inputs missing)",
            "meets_rule_and_justified": "meets the rule",
        }[v]
    if component == "deficit":
        return f"posted {_aki(row['regular_aki'])} vs justified {_aki(row['justified_aki'])} AKI"
    if component == "export_risk":
        return f"exports {_sig3(row['export_risk_l_aki_per_month'])} L·AKI/month of deficit risk"
    if component == "volume":
        return f"sells {row['volume_l_per_month']:,.0f} L/month"
    if component == "days_since_inspection":
        d = row["days_since_inspection"]
        if not np.isfinite(d):
            return "no inspection on record"
        return f"not inspected for {d:,.0f} days"
    if component == "past_failures":
        k = int(round(row["past_test_failures"]))
        return f"{k} past field-test failure{'s' if k != 1 else ''}"
    if component == "complaints":
        k = int(round(row["complaints"]))
        return f"{k} complaint{'s' if k != 1 else ''}"
    raise KeyError(component)  # pragma: no cover


def inspection_priorities(
    stations: pd.DataFrame,
    weights: PriorityWeights | None = None,
    *,
    today: dt.date,
) -> pd.DataFrame:
    """Rank stations for inspection by a transparent priority score (0–100 points).

    Parameters
    ----------
    stations : DataFrame or GeoDataFrame
        Station table; columns as in :func:`normalised_components`, plus ``name`` (quoted)
        and ``lon``, ``lat`` [degrees, EPSG:4326] (passed through for the plan).
    weights : PriorityWeights, optional
        Default ``PriorityWeights()`` (invented planning choices).
    today : datetime.date
        Reference day for the days since the last inspection.

    Returns
    -------
    DataFrame, one row per station, best first (fresh RangeIndex): ``rank`` (1 = inspect
    first; ties broken by ``station_id``), ``station_id``, ``name``, ``score`` [points, 0–100],
    ``score_<component>`` [points] for each of :data:`SCORE_COMPONENTS`, ``reason`` (the
    ``reason_top_n`` largest positive contributions in words, with their numbers), then the raw
    inputs ``verdict``, ``deficit_aki``, ``export_risk_l_aki_per_month``,
    ``volume_l_per_month``, ``days_since_inspection`` [d, NaN: never], ``past_test_failures``,
    ``complaints``, and ``lon``, ``lat`` when given. ``attrs`` carries the reference values
    of :func:`normalised_components`.

    Notes
    -----
    score_c = 100 · w_c / Σ_k w_k · n_c;  score = Σ_c score_c (the columns add up exactly to
    the score, up to floating-point round-off). Each n_c is non-decreasing in its own input,
    so raising one input of one station never lowers its score or worsens its rank: the
    percentile references r_ref and V_ref never fall when a value rises, and min(r / r_ref, 1)
    (or its log form) still never falls in r (by linear interpolation r_ref grows with slope
    below one, and only while r is at or below it).

    References
    ----------
    Invented planning choices (module table); no published scoring scheme is followed.
    """
    weights = PriorityWeights() if weights is None else weights
    comp = normalised_components(stations, weights, today=today)
    scale = 100.0 / weights.total_weight
    contrib = {
        f"score_{c}": scale * weights.weight(c) * comp[f"n_{c}"].to_numpy(float)
        for c in SCORE_COMPONENTS
    }
    mat = np.column_stack(list(contrib.values())) if len(stations) else np.zeros((0, 7))
    score = mat.sum(axis=1)

    reasons = []
    top = weights.reason_top_n
    # one station's values as ``comp.iloc[i]`` holds them (NumPy scalars), without building a
    # Series per station (most of this function's time on 15,000 stations, measured)
    columns = {c: comp[c].to_numpy() for c in comp.columns}
    for i in range(len(stations)):
        row = {c: v[i] for c, v in columns.items()}
        order = np.argsort(-mat[i], kind="stable")[:top]
        parts = [_phrase(SCORE_COMPONENTS[k], row) for k in order if mat[i, k] > 0]
        reasons.append("; ".join(parts) if parts else "no priority factor present")

    names = (
        stations["name"].astype(object).to_numpy()
        if "name" in stations.columns
        else np.full(len(stations), None, dtype=object)
    )
    out = pd.DataFrame(
        {
            "station_id": stations["station_id"].astype(str).to_numpy(),
            "name": names,
            "score": score,
            **contrib,
            "reason": reasons,
        }
    )
    for c in (
        "verdict",
        "deficit_aki",
        "export_risk_l_aki_per_month",
        "volume_l_per_month",
        "days_since_inspection",
        "past_test_failures",
        "complaints",
    ):
        out[c] = comp[c].to_numpy()
    for c in ("lon", "lat"):
        if c in stations.columns:
            out[c] = _num(stations, c)
    out = out.sort_values(["score", "station_id"], ascending=[False, True], kind="stable")
    out.insert(0, "rank", np.arange(1, len(out) + 1, dtype=np.int64))
    out = out.reset_index(drop=True)
    out.attrs.update(comp.attrs)
    return out


# ----------------------------------------------------------------------------------------------
# Distances and tours
# ----------------------------------------------------------------------------------------------


def road_distance_matrix(graph: RoadGraph, nodes: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    """Shortest road distances between a few graph nodes, with the paths behind them.

    Parameters
    ----------
    graph : RoadGraph
    nodes : array_like of int, shape (k,)
        Graph node indices (repeats allowed).

    Returns
    -------
    (distance_m, predecessors)
        ``distance_m[i, j]`` [m]: shortest directed road distance nodes[i] → nodes[j]
        (inf where none); ``predecessors`` shape (k, n_nodes): scipy's predecessor rows, one
        per entry of ``nodes`` (−9999: none), for path reconstruction.

    Notes
    -----
    One ``scipy.sparse.csgraph.dijkstra`` call on ``graph.adjacency`` (lengths [m]) started at
    the distinct nodes only.
    """
    nodes = np.asarray(nodes, dtype=np.int64).ravel()
    if nodes.size == 0:
        return np.zeros((0, 0)), np.zeros((0, graph.n_nodes), dtype=np.int32)
    uniq, inv = np.unique(nodes, return_inverse=True)
    dist, pred = dijkstra(graph.adjacency, directed=True, indices=uniq, return_predecessors=True)
    dist = np.atleast_2d(dist)
    pred = np.atleast_2d(pred)
    return dist[inv][:, nodes], pred[inv]


def _extended(d: np.ndarray, closed: bool) -> np.ndarray:
    """Matrix (n+2)×(n+2): index 0 the base, 1..n the stops, n+1 the end (the base again when
    ``closed``; free when not)."""
    n1 = d.shape[0]
    e = np.full((n1 + 1, n1 + 1), np.inf)
    e[:n1, :n1] = d
    e[:n1, n1] = d[:, 0] if closed else 0.0
    return e


def tour_length(distance: ArrayLike, order: ArrayLike, closed: bool = True) -> float:
    """Length of a route base → stops in ``order`` (→ base when ``closed``).

    Parameters
    ----------
    distance : array_like, shape (n+1, n+1)
        Distances [any unit]; index 0 is the base, 1..n the stops.
    order : array_like of int
        Stop indices (1..n) in visiting order.
    closed : bool
        Add the leg back to the base.

    Returns
    -------
    float, in the unit of ``distance``.
    """
    d = np.asarray(distance, dtype=float)
    seq = np.r_[0, np.asarray(order, dtype=np.int64)]
    total = float(d[seq[:-1], seq[1:]].sum())
    if closed and seq.size > 1:
        total += float(d[seq[-1], 0])
    return total


def nearest_neighbour_tour(distance: ArrayLike) -> np.ndarray:
    """Nearest-neighbour order: from the base, always to the nearest stop not yet visited.

    Parameters
    ----------
    distance : array_like, shape (n+1, n+1)
        Index 0 the base. Ties go to the lowest index.

    Returns
    -------
    ndarray of int64: the stops 1..n in visiting order.
    """
    d = np.asarray(distance, dtype=float)
    n = d.shape[0] - 1
    left = np.ones(n + 1, dtype=bool)
    left[0] = False
    cur, out = 0, []
    for _ in range(n):
        row = np.where(left, d[cur], np.inf)
        nxt = int(np.argmin(row))
        if not left[nxt]:  # all remaining unreachable: take the lowest index left
            nxt = int(np.flatnonzero(left)[0])
        out.append(nxt)
        left[nxt] = False
        cur = nxt
    return np.asarray(out, dtype=np.int64)


def two_opt(
    distance: ArrayLike, order: ArrayLike, closed: bool = True, max_passes: int = 10_000
) -> np.ndarray:
    """Improve a route by best-improvement 2-opt until no reversal shortens it.

    Parameters
    ----------
    distance : array_like, shape (n+1, n+1)
        Index 0 the base (fixed at the start). May be asymmetric.
    order : array_like of int
        Starting order of the stops 1..n.
    closed : bool
        The route returns to the base.
    max_passes : int
        Upper bound on applied moves (a guard; never reached in practice).

    Returns
    -------
    ndarray of int64: the improved order; never longer than the start.

    Notes
    -----
    Sequence s = (base, stops…, end). Reversing positions i..j (1 ≤ i < j ≤ n) changes the
    length by

        Δ = d(s_{i−1}, s_j) + d(s_i, s_{j+1}) − d(s_{i−1}, s_i) − d(s_j, s_{j+1})
            + Σ_{k=i}^{j−1} [d(s_{k+1}, s_k) − d(s_k, s_{k+1})]

    (the last sum is zero for a symmetric matrix); all (i, j) are evaluated at once with prefix
    sums and the most negative Δ is applied while Δ < −10⁻⁹·(1 + length).
    """
    d = np.asarray(distance, dtype=float)
    n = d.shape[0] - 1
    seq = np.r_[0, np.asarray(order, dtype=np.int64), n + 1]
    if n < 2:
        return seq[1:-1].copy()
    e = _extended(d, closed)
    ii, jj = np.triu_indices(n + 1, k=1)
    keep = ii >= 1
    ii, jj = ii[keep], jj[keep]
    for _ in range(max_passes):
        fwd = e[seq[:-1], seq[1:]]
        bwd = e[seq[1:], seq[:-1]]
        bwd[-1] = 0.0  # end → last stop is never walked
        pf = np.r_[0.0, np.cumsum(fwd)]
        pb = np.r_[0.0, np.cumsum(bwd)]
        with np.errstate(invalid="ignore"):
            delta = (
                e[seq[ii - 1], seq[jj]]
                + e[seq[ii], seq[jj + 1]]
                - e[seq[ii - 1], seq[ii]]
                - e[seq[jj], seq[jj + 1]]
                + (pb[jj] - pb[ii])
                - (pf[jj] - pf[ii])
            )
        delta = np.where(np.isfinite(delta), delta, np.inf)
        k = int(np.argmin(delta))
        length = float(pf[-1])
        if not delta[k] < -1e-9 * (1.0 + (length if np.isfinite(length) else 0.0)):
            break
        i, j = ii[k], jj[k]
        seq[i : j + 1] = seq[i : j + 1][::-1]
    return seq[1:-1].copy()


def exact_tour(distance: ArrayLike, closed: bool = True) -> np.ndarray:
    """Shortest route through all stops, by Held–Karp dynamic programming.

    Parameters
    ----------
    distance : array_like, shape (n+1, n+1)
        Index 0 the base. May be asymmetric. n ≤ 14 (memory 2ⁿ·n).
    closed : bool
        The route returns to the base.

    Returns
    -------
    ndarray of int64: the stops 1..n in an optimal visiting order (ties: lowest indices).

    Notes
    -----
    C(S, j) = min_{k ∈ S∖{j}} C(S∖{j}, k) + d(k, j), C({j}, j) = d(0, j); length =
    min_j C(all, j) + d(j, 0) (closed) or C(all, j) (open). Vectorised over all subsets of
    one size for each end stop j.
    """
    d = np.asarray(distance, dtype=float)
    n = d.shape[0] - 1
    if n <= 1:
        return np.arange(1, n + 1, dtype=np.int64)
    if n > 14:
        raise InspectionError(f"exact_tour handles at most 14 stops (got {n})")
    full = (1 << n) - 1
    masks = np.arange(full + 1, dtype=np.int64)
    pc = np.zeros(full + 1, dtype=np.int64)
    for b in range(n):
        pc += (masks >> b) & 1
    ds = d[1:, 1:]  # stop → stop
    cost = np.full((full + 1, n), np.inf)
    parent = np.full((full + 1, n), -1, dtype=np.int64)
    for j in range(n):
        cost[1 << j, j] = d[0, j + 1]
    for size in range(2, n + 1):
        layer = masks[pc == size]
        for j in range(n):
            sel = layer[(layer >> j) & 1 == 1]
            prev = sel ^ (1 << j)
            cand = cost[prev] + ds[:, j][None, :]
            k = np.argmin(cand, axis=1)
            cost[sel, j] = cand[np.arange(sel.size), k]
            parent[sel, j] = k
    last = cost[full] + (d[1:, 0] if closed else 0.0)
    j = int(np.argmin(last))
    out = []
    mask = full
    while j >= 0:
        out.append(j + 1)
        pj = int(parent[mask, j])
        mask ^= 1 << j
        j = pj
    return np.asarray(out[::-1], dtype=np.int64)


def order_stops(
    distance: ArrayLike, closed: bool = True, exact_max_stops: int = 10
) -> tuple[np.ndarray, str]:
    """Visiting order of a day's stops: exact when small, else nearest neighbour + 2-opt.

    Parameters
    ----------
    distance : array_like, shape (n+1, n+1)
        Index 0 the base.
    closed : bool
        The route returns to the base.
    exact_max_stops : int
        Largest n solved exactly (:func:`exact_tour`).

    Returns
    -------
    (order, method)
        Stops 1..n in visiting order; ``method`` is ``"exact"`` or ``"nn_2opt"``.
    """
    d = np.asarray(distance, dtype=float)
    n = d.shape[0] - 1
    if n <= exact_max_stops:
        return exact_tour(d, closed), "exact"
    return two_opt(d, nearest_neighbour_tour(d), closed), "nn_2opt"


# ----------------------------------------------------------------------------------------------
# Plan
# ----------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class InspectionPlan:
    """Output of :func:`plan_inspections`.

    Attributes
    ----------
    plan : DataFrame
        The itinerary, one row per visit and (when routes return to base) one ``kind="return"``
        row per day: ``day`` (1 = the day holding the top-priority station), ``base_id``,
        ``base_name``, ``stop_order`` (1…), ``kind`` ("visit" / "return"), ``station_id``,
        ``name``, ``rank``, ``score`` [points], ``leg_km`` (road distance from the previous
        stop or the base) [km], ``cumulative_km`` [km], ``reason`` (the priority reason).
    routes : GeoDataFrame
        One LineString per day in the graph's CRS: ``day``, ``base_id``, ``n_stops``,
        ``length_km`` [km, the road length from ``adjacency``: geodesic for a graph built
        from lon/lat lines, so the planar length of the geometry may differ slightly],
        ``method`` ("exact" / "nn_2opt"). A day whose stops all sit on the base's node has
        an empty LineString.
    unplanned : DataFrame
        Every station not in the plan: ``rank``, ``station_id``, ``name``, ``score``,
        ``base_id`` (nearest base by road, None if none), ``status`` (one of
        :data:`UNPLANNED_STATUSES`), ``reason`` (why, with numbers), ``priority_reason``.
    summary : dict
        Counts and totals for the run manifest.
    """

    plan: pd.DataFrame
    routes: gpd.GeoDataFrame
    unplanned: pd.DataFrame
    summary: dict[str, Any] = field(default_factory=dict)


def _points_xy(df: pd.DataFrame, graph: RoadGraph, xy_crs: Any, what: str) -> np.ndarray:
    """Point coordinates in the graph's CRS from ``x``/``y`` (in ``xy_crs``, default the
    graph's CRS), ``lon``/``lat`` (EPSG:4326) or a point geometry (its CRS)."""
    if {"x", "y"} <= set(df.columns):
        x, y = _num(df, "x"), _num(df, "y")
        src = graph.crs if xy_crs is None else CRS.from_user_input(xy_crs)
    elif {"lon", "lat"} <= set(df.columns):
        x, y = _num(df, "lon"), _num(df, "lat")
        src = CRS.from_epsg(4326)
    elif isinstance(df, gpd.GeoDataFrame) and df.crs is not None:
        g = np.asarray(df.geometry.values, dtype=object)
        is_pt = shapely.get_type_id(g) == 0
        x = np.where(is_pt, shapely.get_x(g), np.nan)
        y = np.where(is_pt, shapely.get_y(g), np.nan)
        src = CRS.from_user_input(df.crs)
    else:
        raise InspectionError(
            f"{what}: no position columns (x/y, lon/lat or a point geometry with a CRS)"
        )
    xx, yy = transform_points(x, y, src, graph.crs)
    return np.column_stack([xx, yy])


def _path_nodes(pred_row: np.ndarray, src: int, dst: int) -> list[int]:
    """Node sequence src → dst from one dijkstra predecessor row (src alone if equal)."""
    out = [dst]
    cur = dst
    while cur != src:
        cur = int(pred_row[cur])
        if cur == _NO_PRED or cur < 0:
            raise InspectionError(f"no path from node {src} to node {dst}")  # pragma: no cover
        out.append(cur)
    return out[::-1]


def _path_coords(graph: RoadGraph, nodes: list[int]) -> np.ndarray:
    """Coordinates along a node path, edge geometries oriented and joined (no repeats)."""
    if len(nodes) < 2:
        return np.zeros((0, 2))
    tails = np.asarray(nodes[:-1], dtype=np.int64)
    heads = np.asarray(nodes[1:], dtype=np.int64)
    ent = graph.entry_index(tails, heads)
    if (ent < 0).any():  # pragma: no cover - dijkstra only walks existing entries
        raise InspectionError("path uses a step the adjacency does not hold")
    edges = graph.entry_edge[ent]
    fwd = graph.entry_forward[ent]
    xy, gi = shapely.get_coordinates(graph.geometry[edges], return_index=True)
    counts = np.bincount(gi, minlength=edges.size)
    starts = np.r_[0, np.cumsum(counts)[:-1]]
    local = np.arange(gi.size) - starts[gi]
    src = starts[gi] + np.where(fwd[gi], local, counts[gi] - 1 - local)
    xy = xy[src]
    keep = (local != 0) | (gi == 0)
    return xy[keep]


def _sweep_groups(angles: np.ndarray, k: int) -> list[np.ndarray]:
    """Split positions into k groups of consecutive angle (sizes differ by ≤ 1), starting after
    the widest angular gap."""
    order = np.argsort(angles, kind="stable")
    a = angles[order]
    if a.size > 1:
        gaps = np.diff(np.r_[a, a[0] + 2 * np.pi])
        start = (int(np.argmax(gaps)) + 1) % a.size
        order = np.roll(order, -start)
    return [g for g in np.array_split(order, k) if g.size]


@dataclass
class _Day:
    base: int
    stops: list[int]  # positions into the station arrays
    order: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    length_m: float = 0.0
    method: str = "exact"
    dist: np.ndarray | None = None
    pred: np.ndarray | None = None


def plan_inspections(
    graph: RoadGraph,
    priorities: pd.DataFrame,
    bases: pd.DataFrame,
    params: InspectionPlanParams | None = None,
    *,
    station_nodes: ArrayLike | None = None,
    xy_crs: Any = None,
) -> InspectionPlan:
    """Pick stations by priority within a budget and route each inspection day by road.

    Parameters
    ----------
    graph : RoadGraph
        Routable road graph (lengths [m] in ``adjacency``).
    priorities : DataFrame
        Output of :func:`inspection_priorities` (needs ``station_id``, ``score``; uses
        ``rank``, ``name``, ``reason``) with positions: ``x``/``y`` (in ``xy_crs``), ``lon``/
        ``lat`` [degrees] or a point geometry — unless ``station_nodes`` is given.
    bases : DataFrame
        Inspector bases: ``base_id``, ``name`` (optional) and a position as above. Every base
        must lie within ``max_snap_distance_m`` of a road.
    params : InspectionPlanParams, optional
        Budget and routing options; default ``InspectionPlanParams()``.
    station_nodes : array_like of int, optional
        Graph node of each row of ``priorities`` (−1: not on the network), e.g. from an
        earlier :func:`pipeline.roadgraph.snap_points`; default: snap the positions here.
    xy_crs : CRS, optional
        CRS of ``x``/``y`` columns; default the graph's CRS.

    Returns
    -------
    InspectionPlan
        ``plan`` (itinerary), ``routes`` (day LineStrings), ``unplanned`` (every other station
        with its status and reason) and ``summary``. Each station of ``priorities`` appears
        exactly once in ``plan`` (as a visit) or in ``unplanned``.

    Raises
    ------
    InspectionError
        Missing columns, duplicate ``station_id`` or ``base_id``, no base, a base off the
        road network.

    Notes
    -----
    1. Eligibility: a station needs a position on the network (snapped within
       ``max_snap_distance_m``), a road route to and from some base, a round trip from its
       base within ``max_daily_km`` (if set) and a score above ``min_score``.
    2. Base: the one with the shortest road round trip d(b→s) + d(s→b) (two dijkstra calls
       from the bases, on the adjacency and on its transpose).
    3. Selection, best rank first: a station is taken if its base has a day with a free slot
       or a new day is still within the budget (Σ_b ⌈n_b / per_day⌉ ≤ days); otherwise it is
       left out as ``over_budget`` and lower-ranked stations of other bases may still fill
       free slots. So at most ``inspections_per_day × days`` visits.
    4. Days: each base's stations are split into ⌈n_b / per_day⌉ days by a sweep around the
       base (polar angle of the snapped nodes, starting after the widest gap, sizes differing
       by at most one) and each day is ordered (:func:`order_stops`).
    5. Daily limit (when set): from a day longer than ``max_daily_km`` the lowest-ranked stop
       is removed until it fits; removed stops fill days left in the budget (best rank first,
       added while the day still fits) and the rest are ``over_daily_limit``.

    The route length of a day is the road distance base → stops (→ base); stations are
    routed from their snapped node (:func:`pipeline.roadgraph.snap_points`: the access from
    the station to the road is not counted).
    """
    params = InspectionPlanParams() if params is None else params
    for col in ("station_id", "score"):
        if col not in priorities.columns:
            raise InspectionError(f"priorities lack column {col!r}")
    if "base_id" not in bases.columns:
        raise InspectionError("bases lack column 'base_id'")
    if len(bases) == 0:
        raise InspectionError("no inspector base given")
    pr = priorities.reset_index(drop=True)
    n = len(pr)
    sid = pr["station_id"].astype(str).to_numpy()
    if len(set(sid)) != n:
        raise InspectionError("priorities hold duplicate station_id values")
    bid = bases["base_id"].astype(str).to_numpy()
    if len(set(bid)) != len(bid):
        raise InspectionError("bases hold duplicate base_id values")
    bname = bases["name"].astype(str).to_numpy() if "name" in bases.columns else bid.astype(object)
    score = _num(pr, "score")
    rank = (
        pr["rank"].to_numpy(dtype=np.int64)
        if "rank" in pr.columns
        else np.argsort(np.argsort(-score, kind="stable"), kind="stable") + 1
    )
    names = pr["name"].astype(object).to_numpy() if "name" in pr.columns else sid.astype(object)
    preason = pr["reason"].astype(object).to_numpy() if "reason" in pr.columns else [""] * n
    per_day, ndays = params.inspections_per_day, params.days
    limit_m = None if params.max_daily_km is None else params.max_daily_km * _M_PER_KM

    # --- positions on the network
    b_xy = _points_xy(bases.reset_index(drop=True), graph, xy_crs, "bases")
    b_node, b_dist, b_snap = snap_points(graph, b_xy, params.max_snap_distance_m)
    if not b_snap.all():
        bad = [
            f"{bid[i]} ({'no position' if not np.isfinite(b_dist[i]) else f'{b_dist[i]:,.0f} m'})"
            for i in np.flatnonzero(~b_snap)
        ]
        raise InspectionError(
            f"inspector bases off the road network (limit {params.max_snap_distance_m:,.0f} m): "
            + ", ".join(bad)
        )
    if station_nodes is None:
        s_xy = _points_xy(pr, graph, xy_crs, "stations")
        s_node, s_dist, s_snap = snap_points(graph, s_xy, params.max_snap_distance_m)
        has_pos = np.isfinite(s_xy).all(axis=1)
    else:
        s_node = np.asarray(station_nodes, dtype=np.int64).ravel()
        if s_node.size != n:
            raise InspectionError(f"station_nodes has {s_node.size} entries for {n} stations")
        s_snap = (s_node >= 0) & (s_node < graph.n_nodes)
        s_dist = np.full(n, np.nan)
        has_pos = np.ones(n, dtype=bool)

    # --- nearest base by road round trip
    nb = len(bid)
    out_d = np.atleast_2d(dijkstra(graph.adjacency, directed=True, indices=b_node))
    in_d = np.atleast_2d(dijkstra(graph.adjacency.T.tocsr(), directed=True, indices=b_node))
    rt = np.full((nb, n), np.inf)
    ok = np.flatnonzero(s_snap)
    rt[:, ok] = out_d[:, s_node[ok]] + in_d[:, s_node[ok]]
    base_of = np.argmin(rt, axis=0) if n else np.zeros(0, dtype=np.int64)
    rt_best = rt[base_of, np.arange(n)] if n else np.zeros(0)

    status = np.full(n, "", dtype=object)
    why = np.full(n, "", dtype=object)
    for i in range(n):
        if not has_pos[i]:
            status[i], why[i] = "no_position", "no usable position"
        elif not s_snap[i]:
            status[i] = "off_network"
            why[i] = (
                f"nearest road {s_dist[i] / _M_PER_KM:,.1f} km away "
                f"(limit {params.max_snap_distance_m / _M_PER_KM:,.1f} km)"
                if np.isfinite(s_dist[i])
                else "not on the road network"
            )
        elif not np.isfinite(rt_best[i]):
            status[i], why[i] = "unreachable", "no road route to and from any inspector base"
        elif limit_m is not None and rt_best[i] > limit_m + 1e-6:
            status[i] = "over_daily_limit"
            why[i] = (
                f"round trip from base {bid[base_of[i]]} is {rt_best[i] / _M_PER_KM:,.1f} km, "
                f"over the daily limit of {params.max_daily_km:,.1f} km"
            )
        elif not score[i] > params.min_score:
            status[i] = "below_threshold"
            why[i] = f"score {score[i]:.1f} not above the planning threshold {params.min_score:g}"

    # --- selection by rank
    by_rank = np.argsort(rank, kind="stable")
    count = np.zeros(nb, dtype=np.int64)
    days_used = 0
    chosen: list[int] = []
    budget_txt = f"{per_day} inspections/day × {ndays} days"
    for i in by_rank:
        if status[i]:
            continue
        b = base_of[i]
        new_day = count[b] % per_day == 0
        if new_day and days_used >= ndays:
            status[i] = "over_budget"
            why[i] = f"no inspection day left for base {bid[b]} (budget {budget_txt})"
            continue
        count[b] += 1
        days_used += int(new_day)
        chosen.append(int(i))

    # --- days per base, routed
    def route(day: _Day) -> _Day:
        nodes = np.r_[b_node[day.base], s_node[day.stops]]
        dist, pred = road_distance_matrix(graph, nodes)
        order, method = order_stops(dist, params.return_to_base, params.exact_max_stops)
        day.order = order
        day.method = method
        day.length_m = tour_length(dist, order, params.return_to_base)
        day.dist, day.pred = dist, pred
        return day

    pos_of = {i: k for k, i in enumerate(by_rank)}  # priority position
    days: list[_Day] = []
    for b in range(nb):
        mine = [i for i in chosen if base_of[i] == b]
        if not mine:
            continue
        k = -(-len(mine) // per_day)
        bxy = graph.node_xy[b_node[b]]
        sxy = graph.node_xy[s_node[mine]]
        ang = np.arctan2(sxy[:, 1] - bxy[1], sxy[:, 0] - bxy[0])
        for grp in _sweep_groups(ang, k):
            stops = sorted((mine[g] for g in grp), key=pos_of.__getitem__)
            days.append(route(_Day(base=b, stops=stops)))

    if limit_m is not None:
        pending: list[int] = []
        for day in days:
            while day.length_m > limit_m + 1e-6 and len(day.stops) > 1:
                pending.append(day.stops.pop())  # stops are kept in rank order
                route(day)
        spare = ndays - len(days)
        pending.sort(key=pos_of.__getitem__)
        while pending and spare > 0:
            b = base_of[pending[0]]
            day = route(_Day(base=b, stops=[pending.pop(0)]))
            for i in [p for p in pending if base_of[p] == b]:
                if len(day.stops) >= per_day:
                    break
                trial = route(_Day(base=b, stops=[*day.stops, i]))
                if trial.length_m <= limit_m + 1e-6:
                    day = trial
                    pending.remove(i)
            days.append(day)
            spare -= 1
        for i in pending:
            status[i] = "over_daily_limit"
            why[i] = (
                f"does not fit any day within the daily limit of {params.max_daily_km:,.1f} km "
                f"(budget {budget_txt})"
            )

    # --- itinerary and geometry, days numbered by their best-ranked station
    days.sort(key=lambda d: min(pos_of[i] for i in d.stops))
    rows: list[dict[str, Any]] = []
    lines, rmeta = [], []
    for dn, day in enumerate(days, start=1):
        seq = np.r_[0, day.order]
        if params.return_to_base:
            seq = np.r_[seq, 0]
        cum = 0.0
        coords: list[np.ndarray] = []
        have = False
        nodes = np.r_[b_node[day.base], s_node[day.stops]]
        for k in range(1, seq.size):
            a, c = int(seq[k - 1]), int(seq[k])
            leg = float(day.dist[a, c])
            cum += leg
            pc = _path_coords(graph, _path_nodes(day.pred[a], int(nodes[a]), int(nodes[c])))
            if have and pc.shape[0]:
                pc = pc[1:]
            have = have or pc.shape[0] > 0
            coords.append(pc)
            if c == 0:
                rows.append(
                    dict(
                        day=dn,
                        base_id=bid[day.base],
                        base_name=bname[day.base],
                        stop_order=k,
                        kind="return",
                        station_id=None,
                        name=f"return to {bname[day.base]}",
                        rank=pd.NA,
                        score=np.nan,
                        leg_km=leg / _M_PER_KM,
                        cumulative_km=cum / _M_PER_KM,
                        reason="return to base",
                    )
                )
            else:
                i = day.stops[c - 1]
                rows.append(
                    dict(
                        day=dn,
                        base_id=bid[day.base],
                        base_name=bname[day.base],
                        stop_order=k,
                        kind="visit",
                        station_id=sid[i],
                        name=names[i],
                        rank=int(rank[i]),
                        score=float(score[i]),
                        leg_km=leg / _M_PER_KM,
                        cumulative_km=cum / _M_PER_KM,
                        reason=preason[i],
                    )
                )
        xy = np.concatenate(coords) if coords else np.zeros((0, 2))
        lines.append(shapely.linestrings(xy) if xy.shape[0] >= 2 else shapely.LineString())
        rmeta.append(
            dict(
                day=dn,
                base_id=bid[day.base],
                n_stops=len(day.stops),
                length_km=day.length_m / _M_PER_KM,
                method=day.method,
            )
        )

    plan_cols = [
        "day",
        "base_id",
        "base_name",
        "stop_order",
        "kind",
        "station_id",
        "name",
        "rank",
        "score",
        "leg_km",
        "cumulative_km",
        "reason",
    ]
    plan = pd.DataFrame(rows, columns=plan_cols)
    plan["rank"] = plan["rank"].astype("Int64")
    routes = gpd.GeoDataFrame(
        pd.DataFrame(rmeta, columns=["day", "base_id", "n_stops", "length_km", "method"]),
        geometry=lines,
        crs=graph.crs,
    )
    un = np.flatnonzero(status != "")
    un = un[np.argsort(rank[un], kind="stable")]
    unplanned = pd.DataFrame(
        {
            "rank": rank[un].astype(np.int64),
            "station_id": sid[un],
            "name": names[un],
            "score": score[un],
            "base_id": [bid[base_of[i]] if np.isfinite(rt_best[i]) else None for i in un],
            "status": status[un].astype(str),
            "reason": why[un].astype(str),
            "priority_reason": np.asarray(preason, dtype=object)[un],
        }
    )
    summary = {
        "stations": int(n),
        "planned": int(sum(len(d.stops) for d in days)),
        "unplanned": {s: int((status == s).sum()) for s in UNPLANNED_STATUSES},
        "days_used": len(days),
        "days_budget": int(ndays),
        "inspections_per_day": int(per_day),
        "total_km": float(sum(d.length_m for d in days) / _M_PER_KM),
        "bases": {bid[b]: int(sum(len(d.stops) for d in days if d.base == b)) for b in range(nb)},
        "routing_methods": {m: int(sum(d.method == m for d in days)) for m in ("exact", "nn_2opt")},
    }
    return InspectionPlan(plan=plan, routes=routes, unplanned=unplanned, summary=summary)
