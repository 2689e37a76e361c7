"""Grade-supply plan for distributors: the regular grade each station should carry, and its cost.

A pure calculation module (it never opens files). Per station the recommended minimum regular
grade is the higher of what the station's own fleet needs and what the descent corridors of
its fuel need, never below the local rule's minimum:

    need        = max(justified_aki, ⌈corridor_required_aki⌉_step)      (NaN terms ignored)
    recommended = max(need, rule floor)                                   [AKI]

where ⌈·⌉_step rounds up to the posting step (:func:`pipeline.requirement.round_up_to_step`)
and the rule floor is the station's ``rule_minimum_aki`` (from :mod:`pipeline.compliance`) and
the configured ``floor_aki``, whichever are given. Against today's posted regular grade:

| change | when | planned ('after') regular grade |
|---|---|---|
| ``raise`` | recommended > posted | recommended |
| ``keep`` | recommended = posted | posted |
| ``may lower`` | recommended < posted | posted — information only, never a recommendation |
| ``not_assessed`` | posted or the fleet need unknown | posted |

Volumes: regular litres = ``volume_l_per_month`` × ``regular_share`` (blank share → the
configured default); the rest (midgrade and premium) is unchanged. The incremental cost of
the plan is

    cost [USD/month] = regular litres × max(0, recommended − posted) × c

with c the cost per litre per AKI (default 0.025 USD, 2.5 US cents; a retail spread of about
1.5–3.5 US cents per litre per AKI is common practice, no source — /work/shared/DOMAIN.md §4).
A lowered grade is never counted as a saving.

A planning aid: follow the vehicle maker's fuel recommendation; defer to local fuel regulations
and licensed practice.

References
----------
Cost per litre per AKI: common practice, no source (DOMAIN.md §4). Rounding to the posting
step: :func:`pipeline.requirement.round_up_to_step`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from pydantic import BaseModel, ConfigDict, Field

from pipeline.errors import AltigradeError
from pipeline.requirement import round_up_to_step

__all__ = [
    "SupplyError",
    "SupplyParams",
    "SupplyPlan",
    "CHANGES",
    "supply_plan",
]

#: Values of the ``change`` column.
CHANGES = ("raise", "keep", "may lower", "not_assessed")

#: AKI comparisons allow this much round-off [AKI].
_AKI_SLACK = 1e-6

#: Label of the overall totals row.
_ALL = "all stations"


class SupplyError(AltigradeError, ValueError):
    """The station table cannot be turned into a supply plan (missing columns)."""


class SupplyParams(BaseModel):
    """Parameters of the grade-supply plan (defaults: planning choices, sources as noted)."""

    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=False)

    cost_usd_per_l_per_aki: float = Field(
        0.025,
        ge=0,
        description="Cost of one more AKI in one litre of regular [USD/(L·AKI)]; 1.5–3.5 US "
        "cents is common practice, no source (DOMAIN.md §4).",
    )
    posting_step_aki: float = Field(
        1.0, gt=0, description="Posting step the corridor requirement is rounded up to [AKI]."
    )
    default_regular_share: float = Field(
        0.75,
        ge=0,
        le=1,
        description="Share of volume sold as regular where a station leaves it blank [0–1] "
        "(the run configuration's station default).",
    )
    floor_aki: float | None = Field(
        None, gt=0, description="A fixed floor for every station, e.g. a rule minimum [AKI]."
    )
    use_rule_minimum_column: bool = Field(
        True, description="Apply the station's rule_minimum_aki (compliance) as a floor."
    )
    group_by: str | None = Field(
        None,
        description="Station column to total by (a supply terminal, area, fleet_zone ...); "
        "default: operator.",
    )


@dataclass(frozen=True, eq=False)
class SupplyPlan:
    """Output of :func:`supply_plan`.

    Attributes
    ----------
    stations : DataFrame
        One row per station (same index as the input), see :func:`supply_plan`.
    totals : DataFrame
        One row per group and one overall row (``grouping``, ``group``), see
        :func:`supply_plan`.
    grade_volumes : DataFrame
        Long table of litres by grade before and after, per group and overall.
    summary : dict
        Counts and totals for the run manifest.
    """

    stations: pd.DataFrame
    totals: pd.DataFrame
    grade_volumes: pd.DataFrame
    summary: dict[str, Any] = field(default_factory=dict)


def _num(df: pd.DataFrame, col: str) -> np.ndarray:
    if col not in df.columns:
        return np.full(len(df), np.nan)
    return pd.to_numeric(df[col], errors="coerce").to_numpy(dtype=float)


def _aki(x: float) -> str:
    return f"{x:.1f}".rstrip("0").rstrip(".")


def _reason(
    change: str,
    posted: float,
    rec: float,
    just: float,
    corr: float,
    corr_posted: float,
    floor: float,
    driver: str,
) -> str:
    if change == "not_assessed":
        if not np.isfinite(posted):
            return "not assessed: posted regular AKI missing"
        return "not assessed: fleet need unknown (justified_aki missing)"
    parts = []
    if np.isfinite(just):
        parts.append(f"own fleet needs {_aki(just)}")
    if np.isfinite(corr):
        parts.append(f"descent corridors need {corr:.1f} → {_aki(corr_posted)}")
    if np.isfinite(floor):
        parts.append(f"rule minimum {_aki(floor)}")
    why = "; ".join(parts)
    head = {
        "raise": f"raise {_aki(posted)} → {_aki(rec)} AKI",
        "keep": f"keep {_aki(posted)} AKI",
        "may lower": f"may lower {_aki(posted)} → {_aki(rec)} AKI",
    }[change]
    out = f"{head} (set by {driver}): {why}"
    if change == "may lower":
        out += (
            " — information only, not a recommendation: the vehicle makers' recommendations "
            "and the local rule come first"
        )
    return out


def supply_plan(stations: pd.DataFrame, params: SupplyParams | None = None) -> SupplyPlan:
    """Recommended regular grade, litres by grade and incremental cost per station and group.

    Parameters
    ----------
    stations : DataFrame
        Station table. Required: ``station_id``, ``regular_aki`` [AKI], ``justified_aki``
        [AKI, posted (rounded up)]. Optional: ``name``, ``volume_l_per_month`` [L/month]
        (NaN → 0 L), ``regular_share`` [0–1] (NaN → ``default_regular_share``),
        ``corridor_required_aki`` [AKI, unrounded; NaN → no corridor need],
        ``rule_minimum_aki`` [AKI], and the ``group_by`` column.
    params : SupplyParams, optional
        Default ``SupplyParams()``.

    Returns
    -------
    SupplyPlan
        ``stations`` columns: ``station_id``, ``name``, ``regular_aki`` (posted today),
        ``fleet_required_aki``, ``corridor_required_aki``, ``corridor_required_posted_aki``,
        ``rule_floor_aki``, ``recommended_regular_aki``, ``planned_regular_aki`` (the 'after'
        grade: never below today's), ``change`` (:data:`CHANGES`), ``driver`` ("own fleet" /
        "descent corridors" / "rule minimum"), ``raise_aki`` [AKI, ≥ 0],
        ``volume_l_per_month``, ``regular_l_per_month``, ``other_grades_l_per_month``
        (midgrade + premium, unchanged), ``incremental_cost_usd_per_month``, ``group``,
        ``reason``. ``recommended_regular_aki``, ``raise_aki`` and the cost are NaN where
        ``change == "not_assessed"``.

        ``totals`` columns: ``grouping`` (the column totalled by, or "all"), ``group``,
        ``stations``, ``raise``, ``keep``, ``may_lower``, ``not_assessed`` [count],
        ``volume_l_per_month``, ``regular_l_per_month``, ``raised_regular_l_per_month``,
        ``aki_litres_added_l_aki_per_month`` (Σ regular litres × raise),
        ``incremental_cost_usd_per_month``. Each total is the sum of its stations' rows (NaN
        counted as 0).

        ``grade_volumes`` columns: ``grouping``, ``group``, ``grade`` ("regular" /
        "midgrade+premium"), ``aki`` (regular grade; NaN for the others),
        ``before_l_per_month``, ``after_l_per_month``.

    Raises
    ------
    SupplyError
        A required column or the ``group_by`` column is missing.

    Notes
    -----
    Equations in the module docstring. ``corridor_required_aki`` is rounded up to the posting
    step before it is compared (a pump posts whole steps). The fleet need is the posted
    ``justified_aki``; a station without it is ``not_assessed`` even if the corridors or the
    rule give a figure, so a lower grade is never suggested on partial information.
    """
    params = SupplyParams() if params is None else params
    for col in ("station_id", "regular_aki", "justified_aki"):
        if col not in stations.columns:
            raise SupplyError(
                f"station table lacks column {col!r} "
                f"(have: {', '.join(map(str, stations.columns))})"
            )
    gcol = params.group_by or "operator"
    if params.group_by is not None and gcol not in stations.columns:
        raise SupplyError(f"group_by column {gcol!r} is not in the station table")
    n = len(stations)
    idx = stations.index

    posted = _num(stations, "regular_aki")
    just = _num(stations, "justified_aki")
    corr = _num(stations, "corridor_required_aki")
    corr_p = np.asarray(round_up_to_step(corr, params.posting_step_aki), dtype=float).reshape(-1)
    floors = [np.full(n, np.nan)]
    if params.use_rule_minimum_column:
        floors.append(_num(stations, "rule_minimum_aki"))
    if params.floor_aki is not None:
        floors.append(np.full(n, float(params.floor_aki)))
    with np.errstate(invalid="ignore"):
        floor = np.fmax.reduce(np.vstack(floors), axis=0) if n else np.zeros(0)
        need = np.fmax(just, corr_p)
        rec_all = np.fmax(need, floor)
    assessed = np.isfinite(posted) & np.isfinite(just)
    rec = np.where(assessed, rec_all, np.nan)

    with np.errstate(invalid="ignore"):
        up = rec > posted + _AKI_SLACK
        down = rec < posted - _AKI_SLACK
    change = np.where(
        ~assessed, "not_assessed", np.where(up, "raise", np.where(down, "may lower", "keep"))
    )
    planned = np.where(up, rec, posted)
    raise_aki = np.where(assessed, np.where(up, rec - posted, 0.0), np.nan)

    # which requirement sets the recommendation (ties: own fleet, then corridors, then rule)
    with np.errstate(invalid="ignore"):
        drv_fleet = just >= rec - _AKI_SLACK
        drv_corr = corr_p >= rec - _AKI_SLACK
    driver = np.where(
        ~assessed,
        "",
        np.where(drv_fleet, "own fleet", np.where(drv_corr, "descent corridors", "rule minimum")),
    )

    vol = _num(stations, "volume_l_per_month")
    vol = np.where(np.isfinite(vol), np.maximum(vol, 0.0), 0.0)
    share = _num(stations, "regular_share")
    share = np.clip(np.where(np.isfinite(share), share, params.default_regular_share), 0.0, 1.0)
    reg_l = vol * share
    other_l = vol - reg_l
    cost = reg_l * raise_aki * params.cost_usd_per_l_per_aki

    if gcol in stations.columns:
        g = stations[gcol].astype(object)
        grp = g.map(lambda v: "(none)" if pd.isna(v) or str(v).strip() == "" else str(v))
        grp = grp.to_numpy(dtype=object)
    else:
        grp = np.full(n, "(none)", dtype=object)

    reasons = [
        _reason(change[i], posted[i], rec[i], just[i], corr[i], corr_p[i], floor[i], driver[i])
        for i in range(n)
    ]
    names = (
        stations["name"].astype(object).to_numpy()
        if "name" in stations.columns
        else np.full(n, None, dtype=object)
    )
    st = pd.DataFrame(
        {
            "station_id": stations["station_id"].astype(str).to_numpy(),
            "name": names,
            "regular_aki": posted,
            "fleet_required_aki": just,
            "corridor_required_aki": corr,
            "corridor_required_posted_aki": corr_p,
            "rule_floor_aki": floor,
            "recommended_regular_aki": rec,
            "planned_regular_aki": planned,
            "change": change.astype(str),
            "driver": driver.astype(str),
            "raise_aki": raise_aki,
            "volume_l_per_month": vol,
            "regular_l_per_month": reg_l,
            "other_grades_l_per_month": other_l,
            "incremental_cost_usd_per_month": cost,
            "group": grp,
            "reason": reasons,
        },
        index=idx,
    )

    # --- totals per group and overall
    work = pd.DataFrame(
        {
            "group": grp,
            "stations": 1,
            "raise": change == "raise",
            "keep": change == "keep",
            "may_lower": change == "may lower",
            "not_assessed": change == "not_assessed",
            "volume_l_per_month": vol,
            "regular_l_per_month": reg_l,
            "raised_regular_l_per_month": np.where(up, reg_l, 0.0),
            "aki_litres_added_l_aki_per_month": np.nan_to_num(reg_l * raise_aki),
            "incremental_cost_usd_per_month": np.nan_to_num(cost),
        }
    )
    count_cols = ["stations", "raise", "keep", "may_lower", "not_assessed"]
    work[count_cols] = work[count_cols].astype(np.int64)
    by = work.groupby("group", sort=True).sum(numeric_only=True).reset_index()
    by.insert(0, "grouping", gcol)
    overall = work.drop(columns="group").sum(numeric_only=True).to_frame().T
    overall.insert(0, "group", _ALL)
    overall.insert(0, "grouping", "all")
    totals = pd.concat([by, overall], ignore_index=True)
    totals[count_cols] = totals[count_cols].astype(np.int64)

    # --- litres by grade, before and after
    gv_rows = []
    for label, mask in [*((gname, grp == gname) for gname in by["group"]), (_ALL, None)]:
        m = np.ones(n, dtype=bool) if mask is None else mask
        grouping = "all" if mask is None else gcol
        akis = sorted(set(posted[m & np.isfinite(posted)]) | set(planned[m & np.isfinite(planned)]))
        for a in akis:
            before = float(reg_l[m & (np.abs(posted - a) < _AKI_SLACK)].sum())
            after = float(reg_l[m & (np.abs(planned - a) < _AKI_SLACK)].sum())
            gv_rows.append((grouping, label, "regular", float(a), before, after))
        unknown = m & ~np.isfinite(posted)
        if unknown.any():
            v = float(reg_l[unknown].sum())
            gv_rows.append((grouping, label, "regular", np.nan, v, v))
        o = float(other_l[m].sum())
        gv_rows.append((grouping, label, "midgrade+premium", np.nan, o, o))
    grade_volumes = pd.DataFrame(
        gv_rows,
        columns=["grouping", "group", "grade", "aki", "before_l_per_month", "after_l_per_month"],
    )

    summary = {
        "stations": int(n),
        "changes": {c: int((change == c).sum()) for c in CHANGES},
        "grouping": gcol,
        "regular_l_per_month": float(reg_l.sum()),
        "raised_regular_l_per_month": float(np.where(up, reg_l, 0.0).sum()),
        "incremental_cost_usd_per_month": float(np.nansum(cost)),
        "cost_usd_per_l_per_aki": float(params.cost_usd_per_l_per_aki),
    }
    return SupplyPlan(stations=st, totals=totals, grade_volumes=grade_volumes, summary=summary)
