"""Compliance of posted regular grades: configurable rule sets, field tests and verdicts.

Pure calculation module: takes a station table (pandas DataFrame) that already carries the
station elevation and the fleet model's justified AKI (:mod:`pipeline.requirement`), and returns
one verdict and one human-readable reason per station. Rules are configuration, never law: the
bundled rule files are invented examples. Defer to the local fuel regulations.

Verdicts (:data:`VERDICTS`), first matching wins:

| verdict | when |
|---|---|
| ``not_assessed`` | posted regular AKI missing, or an input the rule needs is missing |
| ``failed_field_test`` | field-tested AKI below posted by more than the tolerance |
| ``not_permitted`` | the rule set does not permit the posted regular AKI at the station |
| ``permitted_not_justified`` | the rule permits it, but it satisfies less than the target share |
| ``meets_rule_and_justified`` | the rule permits it and it satisfies the target share |

Rule sets (``kind``):

| kind | sub-standard regular (below ``standard_aki``) permitted where |
|---|---|
| ``elevation_threshold`` | elevation ≥ ``threshold_elevation_m`` and AKI ≥ ``minimum_aki`` |
| ``fleet_justified`` | AKI ≥ the fleet model's justified AKI and AKI ≥ ``minimum_aki`` |

A regular grade at or above ``standard_aki`` (87, the sea-level standard) is always permitted.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Annotated, Any, Literal

import numpy as np
import pandas as pd
from pydantic import BaseModel, ConfigDict, Field, TypeAdapter, ValidationError, model_validator

from pipeline.errors import ConfigError
from pipeline.octane import ModelInputError
from pipeline.requirement import round_up_to_step

__all__ = [
    "VERDICTS",
    "ElevationThresholdRule",
    "FleetJustifiedRule",
    "RuleSet",
    "rule_set_from_mapping",
    "field_test_failed",
    "assess_compliance",
]

#: Verdict names, in order of precedence.
VERDICTS = (
    "not_assessed",
    "failed_field_test",
    "not_permitted",
    "permitted_not_justified",
    "meets_rule_and_justified",
)

#: Comparisons of AKI values allow this much round-off [AKI] (e.g. 86 − 85.4 = 0.6000000000000085).
_AKI_SLACK = 1e-6


class _RuleBase(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=False)

    name: str = Field(min_length=1, description="Short name shown in reports.")
    description: str = Field("", description="Free text shown in reports.")
    example: bool = Field(
        False, description="True for invented example rules; reports then say so."
    )
    standard_aki: float = Field(
        87.0,
        gt=0,
        description="Sea-level standard for regular [AKI]; always permitted "
        "(87: the North American regular grade, common practice).",
    )
    minimum_aki: float = Field(
        85.0, gt=0, description="Lowest regular AKI permitted anywhere [AKI]."
    )
    field_test_tolerance_aki: float = Field(
        0.6,
        ge=0,
        description="A field test may read this far below the posted AKI before the sample "
        "fails [AKI]; 0.5–0.6, from RON/MON test reproducibility (from memory).",
    )

    @model_validator(mode="after")
    def _floor(self) -> _RuleBase:
        if self.minimum_aki > self.standard_aki:
            raise ValueError(
                f"minimum_aki ({self.minimum_aki}) must not exceed standard_aki "
                f"({self.standard_aki})"
            )
        return self


class ElevationThresholdRule(_RuleBase):
    """Sub-standard regular permitted only at or above a configured elevation.

    Below ``threshold_elevation_m`` regular must be ≥ ``standard_aki``; at or above it
    ≥ ``minimum_aki``. The elevation is the station's (DEM) elevation; a station exactly at the
    threshold counts as at or above it.
    """

    kind: Literal["elevation_threshold"] = "elevation_threshold"
    threshold_elevation_m: float = Field(
        description="Elevation at or above which sub-standard regular is permitted [m]."
    )


class FleetJustifiedRule(_RuleBase):
    """Sub-standard regular permitted only where the fleet model justifies it.

    Regular below ``standard_aki`` is permitted where it is ≥ the fleet model's justified
    minimum AKI (it satisfies the target share of the local fleet) and ≥ ``minimum_aki``.
    """

    kind: Literal["fleet_justified"] = "fleet_justified"


RuleSet = Annotated[ElevationThresholdRule | FleetJustifiedRule, Field(discriminator="kind")]

_RULE_ADAPTER: TypeAdapter[Any] = TypeAdapter(RuleSet)
_KINDS = ("elevation_threshold", "fleet_justified")


def rule_set_from_mapping(data: Mapping[str, Any]) -> ElevationThresholdRule | FleetJustifiedRule:
    """Validate a rule set read from TOML (a mapping with a ``kind`` key).

    Raises
    ------
    pipeline.errors.ConfigError (a ValueError)
        Unknown ``kind`` (the message lists the valid ones: ``elevation_threshold``,
        ``fleet_justified``), unknown or missing keys, or values out of range; the message names
        each key path. The caller adds the file name.
    """
    try:
        return _RULE_ADAPTER.validate_python(dict(data))
    except ValidationError as err:
        parts = []
        for e in err.errors():
            loc = ".".join(str(x) for x in e.get("loc", ()) if not str(x).startswith("function-"))
            # the discriminated union puts the kind in the location: drop it for readability
            loc = loc.split(".", 1)[1] if loc.startswith(_KINDS) and "." in loc else loc
            parts.append(f"key '{loc}': {e['msg']}" if loc else e["msg"])
        raise ConfigError("rule set: " + "; ".join(parts)) from err


def field_test_failed(posted_aki: Any, tested_aki: Any, tolerance_aki: float = 0.6) -> np.ndarray:
    """Whether field tests fail: tested AKI below posted by more than the tolerance.

    Parameters
    ----------
    posted_aki : array_like
        Posted AKI of the sampled grade [AKI].
    tested_aki : array_like
        AKI measured on the sample [AKI]; NaN where no test was made.
    tolerance_aki : float
        Allowed shortfall [AKI]; default 0.6 (RON/MON test reproducibility, from memory).

    Returns
    -------
    Boolean array; False where either value is NaN (no test, no failure).

    Notes
    -----
    fails ⇔ posted − tested > tolerance (+1e-6 AKI for round-off, so a shortfall of exactly the
    tolerance passes). Portable near-infrared readings are screening only; a laboratory engine
    test (ASTM D2699/D2700) confirms a failure.
    """
    p = np.asarray(posted_aki, dtype=float)
    t = np.asarray(tested_aki, dtype=float)
    with np.errstate(invalid="ignore"):
        return np.asarray((p - t) > tolerance_aki + _AKI_SLACK)


def _aki_str(x: float) -> str:
    s = f"{x:.2f}".rstrip("0").rstrip(".")
    return s


def _column(df: pd.DataFrame, name: str, required: bool) -> np.ndarray:
    if name not in df.columns:
        if required:
            raise ModelInputError(
                f"station table lacks column {name!r} (have: {', '.join(map(str, df.columns))})"
            )
        return np.full(len(df), np.nan)
    return pd.to_numeric(df[name], errors="coerce").to_numpy(dtype=float)


def assess_compliance(
    stations: pd.DataFrame,
    rule: ElevationThresholdRule | FleetJustifiedRule,
    target_share: float = 0.90,
    step_aki: float = 1.0,
) -> pd.DataFrame:
    """Verdict and reason for each station's posted regular grade.

    Parameters
    ----------
    stations : DataFrame
        Required columns: ``regular_aki`` [AKI], ``elevation_m`` [m], ``justified_aki`` [AKI,
        unrounded, from :func:`pipeline.requirement.justified_aki`]; optional
        ``field_test_aki`` [AKI]. NaN (or blank) means missing.
    rule : ElevationThresholdRule or FleetJustifiedRule
        The governing rule set (configuration; not any jurisdiction's law unless the user made
        it so).
    target_share : float
        Target share the justified AKI was computed for (quoted in reasons).
    step_aki : float
        Posting step the justified AKI is rounded up to for display [AKI].

    Returns
    -------
    DataFrame on the same index with columns ``verdict`` (one of :data:`VERDICTS`), ``reason``
    (names the numbers used), ``rule_minimum_aki`` [AKI] (lowest regular the rule permits at the
    station; NaN if unknown), ``justified_posted_aki`` [AKI], and nullable booleans
    ``rule_permits``, ``fleet_justified``, ``field_test_failed``.

    Notes
    -----
    fleet_justified ⇔ posted ≥ justified (unrounded, 1e-6 AKI slack), which for a posted value
    on the posting grid is the same as posted ≥ justified rounded up.
    """
    posted = _column(stations, "regular_aki", True)
    elev = _column(stations, "elevation_m", True)
    just = _column(stations, "justified_aki", True)
    tested = _column(stations, "field_test_aki", False)
    just_posted = np.asarray(round_up_to_step(just, step_aki), dtype=float).reshape(-1)
    n = len(stations)
    pct = f"{target_share * 100:g} %"
    std = rule.standard_aki

    has_p, has_z, has_j = ~np.isnan(posted), ~np.isnan(elev), ~np.isnan(just)
    has_t = ~np.isnan(tested)
    ft_fail = field_test_failed(posted, tested, rule.field_test_tolerance_aki)
    with np.errstate(invalid="ignore"):
        meets_std = posted >= std - _AKI_SLACK
        above_floor = posted >= rule.minimum_aki - _AKI_SLACK
        justified = posted >= just - _AKI_SLACK
    if isinstance(rule, ElevationThresholdRule):
        with np.errstate(invalid="ignore"):
            high = elev >= rule.threshold_elevation_m
        rule_min = np.where(has_z, np.where(high, rule.minimum_aki, std), np.nan)
        permits = meets_std | (high & above_floor)
        permits_known = has_p & (has_z | meets_std | ~above_floor)
    else:
        floor_j = np.maximum(rule.minimum_aki, just_posted)
        rule_min = np.where(has_j, np.minimum(std, floor_j), np.nan)
        permits = meets_std | (above_floor & justified)
        permits_known = has_p & (has_j | meets_std | ~above_floor)

    verdict = np.full(n, "meets_rule_and_justified", dtype=object)
    reasons: list[str] = []
    for i in range(n):
        verdict[i], r = _one(
            rule,
            i,
            posted,
            elev,
            just,
            just_posted,
            tested,
            has_p,
            has_z,
            has_j,
            has_t,
            ft_fail,
            permits,
            permits_known,
            justified,
            pct,
        )
        reasons.append(r)

    def _nullable(values: np.ndarray, known: np.ndarray) -> pd.Series:
        return pd.Series(
            pd.array(
                [bool(v) if k else pd.NA for v, k in zip(values, known, strict=True)],
                dtype="boolean",
            ),
            index=stations.index,
        )

    out = pd.DataFrame(
        {
            "verdict": pd.Series(verdict.astype(str), index=stations.index),
            "reason": pd.Series(reasons, index=stations.index, dtype=object),
            "rule_minimum_aki": pd.Series(rule_min, index=stations.index),
            "justified_posted_aki": pd.Series(just_posted, index=stations.index),
        }
    )
    out["rule_permits"] = _nullable(permits, permits_known)
    out["fleet_justified"] = _nullable(justified, has_p & has_j)
    out["field_test_failed"] = _nullable(ft_fail, has_p & has_t)
    return out


def _one(
    rule: ElevationThresholdRule | FleetJustifiedRule,
    i: int,
    posted: np.ndarray,
    elev: np.ndarray,
    just: np.ndarray,
    just_posted: np.ndarray,
    tested: np.ndarray,
    has_p: np.ndarray,
    has_z: np.ndarray,
    has_j: np.ndarray,
    has_t: np.ndarray,
    ft_fail: np.ndarray,
    permits: np.ndarray,
    permits_known: np.ndarray,
    justified: np.ndarray,
    pct: str,
) -> tuple[str, str]:
    """Verdict and reason of one station (see :func:`assess_compliance`)."""
    std = _aki_str(rule.standard_aki)
    if not has_p[i]:
        return "not_assessed", "not assessed: posted regular AKI (regular_aki) missing"
    head = f"regular {_aki_str(posted[i])} AKI"
    head += f" at {elev[i]:,.0f} m" if has_z[i] else " (elevation unknown)"
    if has_j[i]:
        fleet = (
            f"fleet model justifies {just[i]:.1f} → {_aki_str(just_posted[i])} "
            f"for {pct} of vehicles"
        )
    else:
        fleet = "fleet model not assessed (justified_aki missing)"

    if isinstance(rule, ElevationThresholdRule):
        thr = f"{rule.threshold_elevation_m:,.0f} m"
        mn = _aki_str(rule.minimum_aki)
        if posted[i] >= rule.standard_aki - _AKI_SLACK:
            rule_txt = f"meets the {std} AKI standard"
        elif posted[i] < rule.minimum_aki - _AKI_SLACK and not has_z[i]:
            rule_txt = f"rule requires ≥{mn} everywhere"
        elif not has_z[i]:
            rule_txt = f"rule permits ≥{mn} only at or above {thr}; station elevation missing"
        elif elev[i] >= rule.threshold_elevation_m:
            if permits[i]:
                rule_txt = f"rule permits ≥{mn} at or above {thr}"
            else:
                rule_txt = f"rule requires ≥{mn} even at or above {thr}"
        else:
            rule_txt = f"rule requires ≥{std} below {thr} (≥{mn} at or above)"
    else:
        mn = _aki_str(rule.minimum_aki)
        if posted[i] >= rule.standard_aki - _AKI_SLACK:
            rule_txt = f"meets the {std} AKI standard"
        elif posted[i] < rule.minimum_aki - _AKI_SLACK:
            rule_txt = f"rule requires ≥{mn} everywhere"
        else:
            rule_txt = f"rule permits below {std} only where the fleet model justifies it (≥{mn})"

    if has_t[i] and ft_fail[i]:
        short = posted[i] - tested[i]
        ft = (
            f"field test {_aki_str(tested[i])} AKI is {short:.1f} below the posted "
            f"{_aki_str(posted[i])} (tolerance {_aki_str(rule.field_test_tolerance_aki)})"
        )
        return "failed_field_test", f"{ft}; {head}: {rule_txt}; {fleet}"

    if not permits_known[i]:
        return "not_assessed", f"not assessed: {head}: {rule_txt}; {fleet}"
    if not permits[i]:
        tail = f", above the posted {_aki_str(posted[i])}" if has_j[i] and not justified[i] else ""
        return "not_permitted", f"{head}: {rule_txt}; {fleet}{tail}"
    if not has_j[i]:
        return "not_assessed", f"not assessed: {head}: {rule_txt}; {fleet}"
    if not justified[i]:
        return (
            "permitted_not_justified",
            f"{head}: {rule_txt}; but {fleet}, above the posted {_aki_str(posted[i])}",
        )
    return "meets_rule_and_justified", f"{head}: {rule_txt}; {fleet}"
