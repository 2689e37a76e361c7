"""Fleet octane-number requirement (ONR): justified minimum AKI, uncertainty band, break-even
elevation, DEM grids and requirement curves.

Pure, vectorised calculation module: no file access, no global settings. SI inside (Pa, K, m);
octane numbers in AKI [ON]; parameters are frozen pydantic models whose key names carry units,
meant to be embedded as a section of the run configuration.

The model (equations, derivation of the legacy fit, defaults and their sources, limits) is written
up in ``docs/requirement_model.md``. In one paragraph: each engine class k has a normal sea-level
requirement distribution N(μ_k, σ_k²) at the reference condition. A vehicle whose sea-level
requirement is R0 needs, at barometric pressure P, temperature T, humidity ratio W and load L,

    R = a_k(P)·R0 + b_k(P) + c_T·(T − T_ref) + c_W·(W − W_ref) + ΔR_load·L

where (a_k, b_k) is the class's pressure response (an affine map of R0, so the class stays
normal: mean a·μ + b + shift, spread a·σ). The fleet is a mixture of classes with shares w_k; the
share of vehicles a fuel of AKI x satisfies is Σ_k w_k·Φ((x − mean_k)/sd_k), exact, no sampling.
The justified minimum AKI is the target quantile of that mixture.

| pressure response (``kind``) | a(P) | b(P) | used for |
|---|---|---|---|
| ``power_ceiling`` | (P_ref/P)^n | C·(1 − a) | legacy open-loop engines |
| ``knee_linear`` | 1 | −k·max(0, P_knee − P) | closed-loop engines with knock control |
| ``boost_held`` | inner response at P_eff = P_ref·min(1, P/P_crit) | | boost-controlled engines |
| ``none`` | 1 | 0 | null model |

A planning aid: vehicle makers' fuel recommendations and local fuel regulations take precedence.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from typing import Annotated, Any, Literal, NamedTuple

import numpy as np
import pandas as pd
from numba import njit
from numpy.typing import ArrayLike
from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator
from scipy.special import ndtr, ndtri

from pipeline import atmosphere as atm
from pipeline.constants import ZERO_C_K
from pipeline.octane import ModelInputError

__all__ = [
    # parameters
    "ReferenceConditions",
    "PowerCeilingResponse",
    "KneeLinearResponse",
    "BoostHeldResponse",
    "NoResponse",
    "PressureResponse",
    "EngineClassParams",
    "NormalSpread",
    "UniformRange",
    "UncertaintySpec",
    "FleetModelParams",
    "DesignDay",
    "REFERENCE_DAY",
    "ModelYearTransitions",
    "DEFAULT_FLEET_MIX",
    "ModelInputError",
    # results
    "Conditions",
    "JustifiedAki",
    "AkiBand",
    "BreakEven",
    "BREAK_EVEN_STATUSES",
    # functions
    "fit_power_ceiling",
    "design_conditions",
    "coefficient_paths",
    "sample_coefficients",
    "class_requirement_moments",
    "vehicle_requirement_aki",
    "sea_level_equivalent_aki",
    "mix_array",
    "mix_from_model_years",
    "share_satisfied",
    "round_up_to_step",
    "justified_aki",
    "justified_aki_band",
    "break_even_elevation",
    "justified_aki_grid",
    "classify_bands",
    "band_labels",
    "requirement_curve",
]

_PA_PER_KPA = 1000.0
#: A justified value within this distance [AKI] above a posting step counts as on the step, so
#: solver round-off never bumps a station to the next grade.
_ROUNDING_SLACK_AKI = 1e-6
#: Absolute tolerance of the quantile solver [AKI] (bracket width).
_QUANTILE_TOL_AKI = 1e-9
#: A Newton step this small [AKI] ends the iteration (see :func:`_mixture_quantile`).
_NEWTON_ACCEPT_STEP_AKI = 1e-6
#: Elements per chunk in the vectorised solvers (bounds memory at ~ a few hundred MB).
_CHUNK_ELEMENTS = 200_000


class _Frozen(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=False)


# =========================================================================== parameter models


class ReferenceConditions(_Frozen):
    """The condition at which the sea-level requirement distributions are stated.

    The defaults (standard sea-level pressure, 25 °C, 10 g/kg) are a warm, moderately humid day —
    a choice, from memory, not a survey's published rating condition. At sea level the design day
    ``DesignDay(temperature_offset_k=10, relative_humidity_pct=50)`` reproduces it within 0.1 g/kg.
    """

    pressure_kpa: float = Field(
        101.325,
        gt=0,
        description="Reference barometric pressure [kPa]; US Standard Atmosphere 1976 sea level.",
    )
    temperature_k: float = Field(
        298.15,
        gt=0,
        description="Reference ambient temperature [K] (25 °C); a warm design day, from memory.",
    )
    humidity_g_per_kg: float = Field(
        10.0,
        ge=0,
        description="Reference humidity ratio [g water / kg dry air]; from memory.",
    )


class PowerCeilingResponse(_Frozen):
    """Legacy open-loop engines (carburetted / no knock control): large relief with altitude.

    (C − R(P)) = (C − R0)·(P_ref/P)^n, i.e. a = (P_ref/P)^n, b = C·(1 − a). Defaults fitted
    analytically to the check values of the trade (see ``docs/requirement_model.md`` and
    :func:`fit_power_ceiling`): 100 → 85 and 85 → 50 at 10,000 ft give C = 111.25,
    n = ln(7/3)/ln(P0/P(10,000 ft)) = 2.264; the 5,000 ft point (100 → 94) is the check.
    """

    kind: Literal["power_ceiling"] = "power_ceiling"
    ceiling_aki: float = Field(
        111.25,
        description="Ceiling C [AKI] the requirement's distance below scales from; fitted to the "
        "check values 100→85 and 85→50 at 10,000 ft (common practice, no source).",
    )
    exponent: float = Field(
        2.264,
        ge=0,
        description="Exponent n on P_ref/P [-]; fitted to the same check values "
        "(common practice, no source).",
    )


class KneeLinearResponse(_Frozen):
    """Closed-loop engines with knock control: no relief down to a knee pressure, then linear.

    a = 1, b = −k·max(0, P_knee − P). Defaults: P_knee = standard pressure at 3,300 ft (1,006 m),
    k chosen so that 100 at sea level → 98 at 10,000 ft (check values, common practice, no source).
    """

    kind: Literal["knee_linear"] = "knee_linear"
    knee_pressure_kpa: float = Field(
        89.81,
        gt=0,
        description="Pressure [kPa] above which there is no relief; standard pressure at "
        "3,300 ft (common practice, no source).",
    )
    slope_aki_per_kpa: float = Field(
        0.10,
        ge=0,
        description="Relief per kPa below the knee [AKI/kPa]; gives 100 → 98 at 10,000 ft "
        "(common practice, no source).",
    )


class NoResponse(_Frozen):
    """Null pressure response: a = 1, b = 0 (requirement independent of pressure)."""

    kind: Literal["none"] = "none"


_InnerResponse = Annotated[
    PowerCeilingResponse | KneeLinearResponse | NoResponse, Field(discriminator="kind")
]


class BoostHeldResponse(_Frozen):
    """Boost-controlled engines: no relief while the boost control holds manifold pressure.

    At full load the controller holds the manifold pressure the engine has at the reference
    pressure as long as the ambient pressure P stays above the critical pressure P_crit (the
    compressor's limit). Below it, manifold pressure falls in proportion to P, and the engine is
    treated like a naturally aspirated engine whose manifold pressure has fallen by the same
    ratio: the inner response is evaluated at the effective pressure
    P_eff = P_ref·min(1, P/P_crit).
    """

    kind: Literal["boost_held"] = "boost_held"
    critical_pressure_kpa: float = Field(
        65.0,
        gt=0,
        description="Ambient pressure [kPa] down to which boost control holds manifold "
        "pressure (65 kPa ≈ 3,600 m standard atmosphere); from memory — boost-controlled "
        "engines hold full-load torque to roughly 3,000–4,000 m.",
    )
    above_critical: _InnerResponse = Field(
        default_factory=KneeLinearResponse,
        description="Response to the effective pressure above the critical altitude "
        "(default: the knock-controlled knee response).",
    )


PressureResponse = Annotated[
    PowerCeilingResponse | KneeLinearResponse | BoostHeldResponse | NoResponse,
    Field(discriminator="kind"),
]


class EngineClassParams(_Frozen):
    """One engine class: its sea-level requirement distribution and its pressure response."""

    description: str = Field("", description="Free text for reports.")
    mean_aki: float = Field(
        description="Mean sea-level requirement [AKI] at the reference condition (from memory)."
    )
    sd_aki: float = Field(
        gt=0, description="Spread σ of the sea-level requirement [AKI] (normal; from memory)."
    )
    response: PressureResponse = Field(description="Pressure response, chosen by `kind`.")


def _default_classes() -> dict[str, EngineClassParams]:
    return {
        "legacy": EngineClassParams(
            description="open-loop / carburetted, no knock control",
            mean_aki=82.0,
            sd_aki=3.0,
            response=PowerCeilingResponse(),
        ),
        "modern": EngineClassParams(
            description="closed-loop fuel control with knock control, naturally aspirated",
            mean_aki=84.0,
            sd_aki=2.0,
            response=KneeLinearResponse(),
        ),
        "boosted": EngineClassParams(
            description="turbocharged or supercharged with boost control",
            mean_aki=86.0,
            sd_aki=2.0,
            response=BoostHeldResponse(),
        ),
    }


#: A present-day fleet, mostly modern engines (from memory). With the default classes its 90 %
#: requirement at sea level on the reference day is 86.9 AKI → posted 87, the sea-level standard.
DEFAULT_FLEET_MIX: dict[str, float] = {"legacy": 0.05, "modern": 0.85, "boosted": 0.10}


class NormalSpread(_Frozen):
    """Coefficient uncertainty: normal about the nominal value, standard deviation ``sd``
    (in the coefficient's own unit)."""

    kind: Literal["normal"] = "normal"
    sd: float = Field(gt=0)


class UniformRange(_Frozen):
    """Coefficient uncertainty: uniform between absolute values ``low`` and ``high``."""

    kind: Literal["uniform"] = "uniform"
    low: float
    high: float

    @model_validator(mode="after")
    def _ordered(self) -> UniformRange:
        if not self.high > self.low:
            raise ValueError(f"uniform range needs high > low (got {self.low}, {self.high})")
        return self


_Spread = Annotated[NormalSpread | UniformRange, Field(discriminator="kind")]


def _default_uncertainty_coefficients() -> dict[str, Any]:
    return {
        # DOMAIN table ranges (from memory)
        "temperature_aki_per_c": UniformRange(low=0.05, high=0.15),
        "humidity_aki_per_g_per_kg": UniformRange(low=-0.35, high=-0.25),
        "load_increment_aki": UniformRange(low=1.5, high=3.0),
        # judgement (from memory): survey-to-survey scatter of class statistics
        "classes.*.mean_aki": NormalSpread(sd=0.5),
        "classes.*.sd_aki": NormalSpread(sd=0.3),
        # judgement: spread of fits that still pass the check values within tolerance
        "classes.*.response.ceiling_aki": NormalSpread(sd=1.5),
        "classes.*.response.exponent": NormalSpread(sd=0.15),
        "classes.*.response.slope_aki_per_kpa": UniformRange(low=0.05, high=0.15),
        "classes.*.response.knee_pressure_kpa": NormalSpread(sd=3.0),
        "classes.*.response.critical_pressure_kpa": NormalSpread(sd=3.0),
    }


class UncertaintySpec(_Frozen):
    """Coefficient uncertainty for the Monte Carlo band of the justified AKI.

    ``coefficients`` maps a coefficient path (see :func:`coefficient_paths`) to its spread. A
    ``*`` matches one path segment (``classes.*.mean_aki`` = every class's mean; each match is
    drawn independently); an exact key overrides a pattern. Exact keys must name an existing
    coefficient; patterns may match none (so custom class sets keep the defaults valid).
    Defaults: the DOMAIN ranges for temperature, humidity and load (from memory); judgement for
    the rest (from memory).
    """

    draws: int = Field(400, ge=10, le=100_000, description="Monte Carlo draws [-].")
    seed: int = Field(20_240_917, ge=0, description="Seed of the random generator (fixed).")
    band_low: float = Field(0.05, gt=0, lt=1, description="Lower quantile of the band [-].")
    band_high: float = Field(0.95, gt=0, lt=1, description="Upper quantile of the band [-].")
    coefficients: dict[str, _Spread] = Field(default_factory=_default_uncertainty_coefficients)

    @model_validator(mode="after")
    def _band(self) -> UncertaintySpec:
        if not self.band_high > self.band_low:
            raise ValueError("band_high must exceed band_low")
        return self


_CLASS_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


class FleetModelParams(_Frozen):
    """All parameters of the fleet requirement model (a section of the run config)."""

    classes: dict[str, EngineClassParams] = Field(
        default_factory=_default_classes,
        description="Engine classes by name (identifier-like); order fixes the class axis.",
    )
    reference: ReferenceConditions = Field(default_factory=ReferenceConditions)
    temperature_aki_per_c: float = Field(
        0.10,
        description="Requirement change per +1 °C ambient above the reference [AKI/°C]; "
        "≈ +0.1 (from memory).",
    )
    humidity_aki_per_g_per_kg: float = Field(
        -0.30,
        description="Requirement change per +1 g water/kg dry air above the reference "
        "[AKI/(g/kg)]; −0.25…−0.35, default −0.3 (from memory).",
    )
    load_increment_aki: float = Field(
        2.0,
        ge=0,
        description="Increment for sustained full load — towing, long climbs [AKI]; "
        "+1.5…+3 (from memory).",
    )
    target_share: float = Field(
        0.90,
        gt=0,
        lt=1,
        description="Share of the local fleet the justified AKI must satisfy [-]; surveys quote "
        "the 50 % and 90 % points (from memory).",
    )
    posting_step_aki: float = Field(
        1.0,
        gt=0,
        description="Step to which the justified AKI is rounded up, as pumps post [AKI] "
        "(1; 0.5 where half numbers are posted).",
    )
    uncertainty: UncertaintySpec = Field(default_factory=UncertaintySpec)

    @field_validator("classes")
    @classmethod
    def _class_names(cls, v: dict[str, EngineClassParams]) -> dict[str, EngineClassParams]:
        if not v:
            raise ValueError("at least one engine class is needed")
        for name in v:
            if not _CLASS_NAME.match(name):
                raise ValueError(f"engine class name {name!r} must be an identifier (A–Z, 0–9, _)")
        return v

    @model_validator(mode="after")
    def _check(self) -> FleetModelParams:
        p_ref = self.reference.pressure_kpa
        for name, c in self.classes.items():
            if (
                isinstance(c.response, BoostHeldResponse)
                and c.response.critical_pressure_kpa > p_ref
            ):
                raise ValueError(
                    f"classes.{name}.response.critical_pressure_kpa "
                    f"({c.response.critical_pressure_kpa}) must not exceed "
                    f"reference.pressure_kpa ({p_ref})"
                )
        valid = coefficient_paths(self)
        for key in self.uncertainty.coefficients:
            if "*" not in key and key not in valid:
                raise ValueError(
                    f"uncertainty.coefficients: unknown coefficient {key!r}; valid: "
                    + ", ".join(valid)
                )
        return self

    @property
    def class_names(self) -> tuple[str, ...]:
        """Class names in axis order."""
        return tuple(self.classes)


class DesignDay(_Frozen):
    """The weather (and load) under which requirements are evaluated — a planning choice.

    ``temperature_model``: ``standard_lapse`` (T = T_std(z) + offset, US Standard Atmosphere 1976
    lapse) or ``reference`` (T held at the reference temperature at every elevation).
    ``humidity_model``: ``relative`` (relative humidity held fixed → humidity ratio via the ASHRAE
    psychrometrics in :mod:`pipeline.atmosphere`), ``ratio`` (humidity ratio held fixed) or
    ``reference`` (held at the reference humidity ratio). Pressure is always the standard
    atmosphere's at the elevation. Defaults match the run config's ``[design_day]`` defaults.
    """

    temperature_model: Literal["standard_lapse", "reference"] = "standard_lapse"
    temperature_offset_k: float = Field(
        10.0,
        ge=-40,
        le=40,
        description="Offset from the standard-atmosphere temperature [K]; +10 K gives 25 °C at "
        "sea level, the model's reference temperature (a warm day; planning choice).",
    )
    humidity_model: Literal["relative", "ratio", "reference"] = "relative"
    relative_humidity_pct: float = Field(
        50.0,
        ge=0,
        le=100,
        description="Relative humidity [%] (humidity_model = relative); 50 % at 25 °C gives "
        "≈ 9.9 g/kg at sea level, the model's reference humidity.",
    )
    humidity_ratio_g_per_kg: float = Field(
        10.0, ge=0, description="Humidity ratio [g/kg dry air] (humidity_model = ratio)."
    )
    sustained_load: bool = Field(
        False, description="Add the sustained-full-load increment (towing, long climbs)."
    )


#: The design day of the check values: temperature and humidity held at the reference condition
#: at every elevation, pressure from the standard atmosphere.
REFERENCE_DAY = DesignDay(temperature_model="reference", humidity_model="reference")


class ModelYearTransitions(_Frozen):
    """Class shares of *new* vehicles by model year (from memory; configurable).

    Legacy share 1 up to ``legacy_all_until_year``, falling linearly to 0 at
    ``legacy_none_from_year``; boosted share 0 up to ``boosted_start_year``, rising linearly to
    ``boosted_new_share_max`` at ``boosted_full_year`` and constant after; modern the rest.
    Class names are ``legacy``, ``modern`` and ``boosted``.
    """

    legacy_all_until_year: int = Field(
        1985, description="Last model year sold all open-loop (from memory)."
    )
    legacy_none_from_year: int = Field(
        1995, description="First model year without open-loop engines (from memory)."
    )
    boosted_start_year: int = Field(
        2008, description="Model year boosted engines start gaining share (from memory)."
    )
    boosted_full_year: int = Field(
        2022, description="Model year boosted share of new vehicles levels off (from memory)."
    )
    boosted_new_share_max: float = Field(
        0.35, ge=0, le=1, description="Boosted share of new vehicles after that [-] (from memory)."
    )

    @model_validator(mode="after")
    def _order(self) -> ModelYearTransitions:
        if not (
            self.legacy_all_until_year
            < self.legacy_none_from_year
            <= self.boosted_start_year
            < self.boosted_full_year
        ):
            raise ValueError(
                "need legacy_all_until_year < legacy_none_from_year <= boosted_start_year "
                "< boosted_full_year"
            )
        return self


# ================================================================================ results


class Conditions(NamedTuple):
    """Conditions at which requirements are evaluated; fields broadcast against each other.

    pressure_pa [Pa] (barometric ≈ full-load manifold pressure of an NA engine), temperature_k [K]
    (ambient), humidity_g_per_kg [g water/kg dry air], sustained_load [bool].
    """

    pressure_pa: ArrayLike
    temperature_k: ArrayLike
    humidity_g_per_kg: ArrayLike
    sustained_load: ArrayLike = False


class JustifiedAki(NamedTuple):
    """Justified minimum AKI: ``aki`` unrounded [AKI], ``posted_aki`` rounded up to the
    posting step [AKI]."""

    aki: np.ndarray | float
    posted_aki: np.ndarray | float


class AkiBand(NamedTuple):
    """Monte Carlo band of the unrounded justified AKI [AKI]: lower quantile, median, upper
    quantile (by default 5 %, 50 %, 95 %)."""

    low_aki: np.ndarray | float
    median_aki: np.ndarray | float
    high_aki: np.ndarray | float


class BreakEven(NamedTuple):
    """Break-even elevation [m] of a grade and its status (see :func:`break_even_elevation`)."""

    elevation_m: np.ndarray | float
    status: np.ndarray | str


#: Status values of :func:`break_even_elevation`.
BREAK_EVEN_STATUSES = ("crossing", "meets_everywhere", "meets_nowhere", "no_data")


# ============================================================================ small helpers


def _arr(x: ArrayLike) -> np.ndarray:
    return np.asarray(x, dtype=float)


def _out(x: np.ndarray) -> np.ndarray | float:
    x = np.asarray(x)
    return float(x) if x.ndim == 0 else x


def fit_power_ceiling(
    sea_level_a_aki: float,
    altitude_a_aki: float,
    sea_level_b_aki: float,
    altitude_b_aki: float,
    pressure_ratio: float,
) -> tuple[float, float]:
    """Fit the legacy power-ceiling response to two engines observed at one pressure.

    Parameters
    ----------
    sea_level_a_aki, altitude_a_aki : float
        Engine A's requirement at the reference pressure and at the altitude [AKI].
    sea_level_b_aki, altitude_b_aki : float
        The same for engine B (a different sea-level requirement) [AKI].
    pressure_ratio : float
        P_ref / P at the altitude [-] (> 1).

    Returns
    -------
    (C, n): ceiling [AKI] and exponent [-].

    Notes
    -----
    At one pressure the response is the affine map R ↦ C − (C − R)·ρ^n, whose slope a = ρ^n is
    the ratio of the two engines' altitude spreads to their sea-level spread and whose fixed
    point is C:

        a = (R_a − R_b) / (R0_a − R0_b),   C = (R_a − a·R0_a) / (1 − a),   n = ln a / ln ρ.

    With the trade's check values (100 → 85 and 85 → 50 at 10,000 ft): a = 35/15 = 7/3,
    C = 111.25, n = ln(7/3)/ln(P0/P) ≈ 2.264. A third point (100 → 94 at 5,000 ft) then checks
    the fit rather than entering it.

    References
    ----------
    Derivation in ``docs/requirement_model.md``; check values: common practice, no source.
    """
    slope = (altitude_a_aki - altitude_b_aki) / (sea_level_a_aki - sea_level_b_aki)
    if not slope > 1.0 or not pressure_ratio > 1.0:
        raise ModelInputError("the fit needs spreads that widen with altitude and P_ref/P > 1")
    ceiling = (altitude_a_aki - slope * sea_level_a_aki) / (1.0 - slope)
    exponent = math.log(slope) / math.log(pressure_ratio)
    return ceiling, exponent


# ========================================================================= coefficient handling


def _flatten(data: Any, prefix: str, out: dict[str, float]) -> None:
    if isinstance(data, dict):
        for k, v in data.items():
            _flatten(v, f"{prefix}.{k}" if prefix else str(k), out)
    elif isinstance(data, bool) or isinstance(data, str):
        return
    elif isinstance(data, int | float):
        out[prefix] = float(data)


_COEFFICIENT_ROOTS = (
    "classes",
    "reference",
    "temperature_aki_per_c",
    "humidity_aki_per_g_per_kg",
    "load_increment_aki",
)


def _nominal_coefficients(params: FleetModelParams) -> dict[str, float]:
    dumped = params.model_dump(include=set(_COEFFICIENT_ROOTS))
    for c in dumped["classes"].values():
        c.pop("description", None)
    out: dict[str, float] = {}
    _flatten(dumped, "", out)
    return out


def coefficient_paths(params: FleetModelParams) -> list[str]:
    """Dotted paths of every numeric model coefficient, e.g. ``classes.modern.mean_aki`` or
    ``classes.boosted.response.above_critical.slope_aki_per_kpa`` — the keys accepted by
    ``UncertaintySpec.coefficients``."""
    return list(_nominal_coefficients(params))


#: Physical bounds applied to drawn coefficients (by last path segment): (low, high).
_DRAW_BOUNDS: dict[str, tuple[float, float]] = {
    "sd_aki": (0.05, np.inf),
    "exponent": (0.0, np.inf),
    "slope_aki_per_kpa": (0.0, np.inf),
    "knee_pressure_kpa": (1.0, np.inf),
    "critical_pressure_kpa": (1.0, np.inf),
    "pressure_kpa": (1.0, np.inf),
    "temperature_k": (1.0, np.inf),
    "humidity_g_per_kg": (0.0, np.inf),
    "temperature_aki_per_c": (0.0, np.inf),
    "humidity_aki_per_g_per_kg": (-np.inf, 0.0),
    "load_increment_aki": (0.0, np.inf),
}


def sample_coefficients(
    params: FleetModelParams, spec: UncertaintySpec | None = None
) -> dict[str, np.ndarray | float]:
    """Draw model coefficients for the Monte Carlo band.

    Parameters
    ----------
    params : FleetModelParams
        Nominal model.
    spec : UncertaintySpec, optional
        Spreads, draws and seed; default ``params.uncertainty``.

    Returns
    -------
    Mapping coefficient path → array of ``spec.draws`` values (uncertain coefficients) or float
    (fixed ones), in the coefficient's config unit.

    Notes
    -----
    Coefficients are drawn independently (no correlation between, e.g., the legacy ceiling and
    exponent), in sorted path order from ``numpy.random.default_rng(seed)``, so a given spec always
    gives the same draws. Draws are clipped to physical bounds (σ ≥ 0.05 AKI, slopes and exponents
    ≥ 0, temperature coefficient ≥ 0, humidity coefficient ≤ 0) so monotonicity survives.
    """
    spec = params.uncertainty if spec is None else spec
    coef: dict[str, np.ndarray | float] = dict(_nominal_coefficients(params))
    chosen: dict[str, Any] = {}
    for key, spread in spec.coefficients.items():
        if "*" in key:
            pattern = re.compile(
                "^"
                + r"\.".join("[^.]+" if s == "*" else re.escape(s) for s in key.split("."))
                + "$"
            )
            for path in coef:
                if pattern.match(path) and path not in spec.coefficients:
                    chosen[path] = spread
        elif key in coef:
            chosen[key] = spread
        else:
            raise ModelInputError(f"unknown coefficient {key!r}; valid: {', '.join(coef)}")
    rng = np.random.default_rng(spec.seed)
    for path in sorted(chosen):
        spread = chosen[path]
        if isinstance(spread, NormalSpread):
            draw = coef[path] + spread.sd * rng.standard_normal(spec.draws)
        else:
            draw = rng.uniform(spread.low, spread.high, spec.draws)
        lo, hi = _DRAW_BOUNDS.get(path.rsplit(".", 1)[-1], (-np.inf, np.inf))
        coef[path] = np.clip(draw, lo, hi)
    return coef


# ============================================================================= model core


def design_conditions(
    elevation_m: ArrayLike,
    design: DesignDay = DesignDay(),  # noqa: B008 - frozen model, safe default
    reference: ReferenceConditions = ReferenceConditions(),  # noqa: B008
) -> Conditions:
    """Design-day conditions at geometric elevations.

    Parameters
    ----------
    elevation_m : array_like
        Geometric elevation above mean sea level [m]; NaN gives NaN conditions.
    design : DesignDay
        Temperature and humidity models, offsets, sustained load.
    reference : ReferenceConditions
        Used where the design day holds temperature or humidity at the reference.

    Returns
    -------
    :class:`Conditions` with arrays shaped like ``elevation_m``.

    Notes
    -----
    P = US Standard Atmosphere 1976 pressure at z
    (:func:`pipeline.atmosphere.standard_pressure_pa`);
    T = T_std(z) + ΔT (:func:`pipeline.atmosphere.design_temperature_k`) or T_ref;
    W = ASHRAE humidity ratio at (T, RH, P) (:func:`pipeline.atmosphere.humidity_ratio_g_per_kg`),
    or a fixed W. The standard atmosphere ignores the day's weather (a few % in P).
    """
    z = _arr(elevation_m)
    p = _arr(atm.standard_pressure_pa(z))
    if design.temperature_model == "standard_lapse":
        t = _arr(atm.design_temperature_k(z, design.temperature_offset_k))
    else:
        t = np.where(np.isnan(p), np.nan, reference.temperature_k)
    if design.humidity_model == "relative":
        w = _arr(atm.humidity_ratio_g_per_kg(t, design.relative_humidity_pct / 100.0, p))
    elif design.humidity_model == "ratio":
        w = np.where(np.isnan(p), np.nan, design.humidity_ratio_g_per_kg)
    else:
        w = np.where(np.isnan(p), np.nan, reference.humidity_g_per_kg)
    load = np.full(z.shape, bool(design.sustained_load))
    return Conditions(p, t, w, load)


def _response_affine(
    resp: Any, path: str, coef: Mapping[str, Any], p_pa: np.ndarray, p_ref_pa: Any
) -> tuple[Any, Any]:
    """(a, b) of the affine pressure response R = a·R0 + b at pressure ``p_pa``."""
    kind = resp.kind
    if kind == "power_ceiling":
        ceiling = coef[f"{path}.ceiling_aki"]
        a = (p_ref_pa / p_pa) ** coef[f"{path}.exponent"]
        return a, ceiling * (1.0 - a)
    if kind == "knee_linear":
        knee_pa = coef[f"{path}.knee_pressure_kpa"] * _PA_PER_KPA
        slope_per_pa = coef[f"{path}.slope_aki_per_kpa"] / _PA_PER_KPA
        b = -slope_per_pa * np.maximum(0.0, knee_pa - p_pa)
        return np.ones_like(b), b
    if kind == "boost_held":
        crit_pa = coef[f"{path}.critical_pressure_kpa"] * _PA_PER_KPA
        p_eff = p_ref_pa * np.minimum(1.0, p_pa / crit_pa)
        return _response_affine(
            resp.above_critical, f"{path}.above_critical", coef, p_eff, p_ref_pa
        )
    if kind == "none":
        zero = np.zeros_like(p_pa)
        return zero + 1.0, zero
    raise ModelInputError(f"unknown pressure response {kind!r}")  # pragma: no cover


def _condition_shift(coef: Mapping[str, Any], cond: Conditions) -> np.ndarray:
    t = _arr(cond.temperature_k)
    w = _arr(cond.humidity_g_per_kg)
    load = np.asarray(cond.sustained_load, dtype=float)
    return (
        coef["temperature_aki_per_c"] * (t - coef["reference.temperature_k"])
        + coef["humidity_aki_per_g_per_kg"] * (w - coef["reference.humidity_g_per_kg"])
        + coef["load_increment_aki"] * load
    )


def _class_affines(
    params: FleetModelParams, coef: Mapping[str, Any], cond: Conditions
) -> tuple[list[Any], list[Any], np.ndarray]:
    p = _arr(cond.pressure_pa)
    p_ref = coef["reference.pressure_kpa"] * _PA_PER_KPA
    a_list, b_list = [], []
    for name, cls in params.classes.items():
        a, b = _response_affine(cls.response, f"classes.{name}.response", coef, p, p_ref)
        a_list.append(a)
        b_list.append(b)
    return a_list, b_list, _condition_shift(coef, cond)


def _moments(
    params: FleetModelParams, coef: Mapping[str, Any], cond: Conditions
) -> tuple[np.ndarray, np.ndarray]:
    a_list, b_list, shift = _class_affines(params, coef, cond)
    means, sds = [], []
    for name, a, b in zip(params.classes, a_list, b_list, strict=True):
        means.append(a * coef[f"classes.{name}.mean_aki"] + b + shift)
        sds.append(a * coef[f"classes.{name}.sd_aki"])
    means_b = np.broadcast_arrays(*means, *sds)
    k = len(params.classes)
    return np.stack(means_b[:k], axis=-1), np.stack(means_b[k:], axis=-1)


def class_requirement_moments(
    params: FleetModelParams, conditions: Conditions
) -> tuple[np.ndarray, np.ndarray]:
    """Mean and spread of each class's requirement distribution at the given conditions.

    Parameters
    ----------
    params : FleetModelParams
    conditions : Conditions
        Pressure [Pa], temperature [K], humidity ratio [g/kg], sustained load; broadcast shape S.

    Returns
    -------
    (mean_aki, sd_aki): arrays of shape S + (n_classes,) [AKI], classes in ``params.classes``
    order; NaN where a condition is NaN.

    Notes
    -----
    Class k is N(μ_k, σ_k²) at the reference; under R = a·R0 + b + shift it stays normal with
    mean a·μ_k + b + shift and spread a·σ_k, where
    shift = c_T·(T − T_ref) + c_W·(W − W_ref) + ΔR_load·L (see module docstring).

    References
    ----------
    ``docs/requirement_model.md``; coefficients from memory or fitted to common-practice check
    values.
    """
    return _moments(params, _nominal_coefficients(params), conditions)


def _class_index(params: FleetModelParams, class_name: str) -> str:
    if class_name not in params.classes:
        raise ModelInputError(
            f"unknown engine class {class_name!r}; valid: {', '.join(params.classes)}"
        )
    return class_name


def vehicle_requirement_aki(
    sea_level_aki: ArrayLike,
    class_name: str,
    params: FleetModelParams,
    conditions: Conditions,
) -> np.ndarray | float:
    """Requirement of individual vehicles of one class at the given conditions.

    Parameters
    ----------
    sea_level_aki : array_like
        The vehicles' requirement at the reference condition [AKI].
    class_name : str
        Engine class (a key of ``params.classes``); unknown names raise, listing the valid ones.
    params : FleetModelParams
    conditions : Conditions

    Returns
    -------
    Requirement R [AKI] = a(P)·R0 + b(P) + shift(T, W, L), broadcast shape.

    Notes
    -----
    This is the per-engine shift the trade's check values describe (e.g. a legacy engine needing
    100 at sea level needs ≈ 94 at 5,000 ft on the same design day).
    """
    _class_index(params, class_name)
    coef = _nominal_coefficients(params)
    p = _arr(conditions.pressure_pa)
    p_ref = coef["reference.pressure_kpa"] * _PA_PER_KPA
    resp = params.classes[class_name].response
    a, b = _response_affine(resp, f"classes.{class_name}.response", coef, p, p_ref)
    return _out(a * _arr(sea_level_aki) + b + _condition_shift(coef, conditions))


def sea_level_equivalent_aki(
    aki_at_conditions: ArrayLike,
    class_name: str,
    params: FleetModelParams,
    conditions: Conditions,
) -> np.ndarray | float:
    """Inverse of :func:`vehicle_requirement_aki`: the sea-level (reference) requirement R0* of
    a vehicle that needs exactly ``aki_at_conditions`` [AKI] at the conditions.

    R0* = (x − b − shift) / a. A fuel of AKI x satisfies every vehicle of the class with
    R0 ≤ R0*, so the class share satisfied is Φ((R0* − μ)/σ).
    """
    _class_index(params, class_name)
    coef = _nominal_coefficients(params)
    p = _arr(conditions.pressure_pa)
    p_ref = coef["reference.pressure_kpa"] * _PA_PER_KPA
    resp = params.classes[class_name].response
    a, b = _response_affine(resp, f"classes.{class_name}.response", coef, p, p_ref)
    return _out((_arr(aki_at_conditions) - b - _condition_shift(coef, conditions)) / a)


# =================================================================================== mixes


_MIX_SUM_TOL = 1e-3


def mix_array(mix: Mapping[str, ArrayLike] | ArrayLike, params: FleetModelParams) -> np.ndarray:
    """Fleet mix as an array of class shares, shape S + (n_classes,).

    Parameters
    ----------
    mix : mapping or array_like
        Either a mapping class name → share (scalar or array; missing classes get 0; unknown
        names raise, listing the valid ones), or an array whose last axis is the class axis in
        ``params.classes`` order, e.g. (n_stations, n_classes).
    params : FleetModelParams

    Returns
    -------
    Shares [-], each row renormalised to sum exactly 1. Rows with any NaN share are all NaN.

    Raises
    ------
    ModelInputError
        Negative shares, a wrong class axis, or a row whose shares do not sum to 1 ± 0.001.
    """
    names = params.class_names
    if isinstance(mix, Mapping):
        unknown = [k for k in mix if k not in params.classes]
        if unknown:
            raise ModelInputError(
                f"unknown engine class(es) {unknown} in fleet mix; valid: {', '.join(names)}"
            )
        parts = np.broadcast_arrays(*[_arr(mix.get(n, 0.0)) for n in names])
        w = np.stack(parts, axis=-1)
    else:
        w = _arr(mix)
        if w.ndim == 0 or w.shape[-1] != len(names):
            raise ModelInputError(
                f"fleet mix array needs a last axis of {len(names)} classes ({', '.join(names)}); "
                f"got shape {w.shape}"
            )
    with np.errstate(invalid="ignore"):
        if np.any(w < 0):
            raise ModelInputError("fleet mix shares must be ≥ 0")
        total = w.sum(axis=-1, keepdims=True)
        bad = np.abs(total - 1.0) > _MIX_SUM_TOL
    if np.any(bad):
        worst = total[bad].ravel()[:3].tolist()
        raise ModelInputError(
            f"fleet mix shares must sum to 1 (±{_MIX_SUM_TOL}); {int(np.count_nonzero(bad))} "
            f"row(s) do not, e.g. sums {worst}"
        )
    return w / total


def mix_from_model_years(
    years_histogram: Mapping[Any, ArrayLike] | tuple[ArrayLike, ArrayLike],
    transitions: ModelYearTransitions = ModelYearTransitions(),  # noqa: B008
) -> dict[str, np.ndarray | float]:
    """Class shares of a fleet from its model-year distribution.

    Parameters
    ----------
    years_histogram : mapping or (years, counts)
        Either model year → vehicle count (keys int or digit strings, as TOML gives them), or a
        pair (years 1-D, counts with the year axis last, e.g. (n_stations, n_years)).
    transitions : ModelYearTransitions
        New-vehicle class shares by model year (from memory; configurable).

    Returns
    -------
    ``{"legacy": share, "modern": share, "boosted": share}`` [-]; floats, or arrays of the
    counts' leading shape. NaN where the counts sum to 0 or contain NaN.

    Notes
    -----
    share_k = Σ_y n_y·s_k(y) / Σ_y n_y, with s_k(y) the piecewise-linear new-vehicle shares of
    :class:`ModelYearTransitions`. Assumes a vehicle keeps its class for life and that all model
    years are driven equally (weight by distance driven by passing weighted counts).
    """
    if isinstance(years_histogram, Mapping):
        years = np.array([int(y) for y in years_histogram], dtype=float)
        counts = np.stack(
            np.broadcast_arrays(*[_arr(v) for v in years_histogram.values()]), axis=-1
        )
    else:
        years = _arr(years_histogram[0])
        counts = _arr(years_histogram[1])
    if years.ndim != 1 or counts.shape[-1:] != years.shape:
        raise ModelInputError("model-year counts need the year axis last, matching `years`")
    with np.errstate(invalid="ignore"):
        if np.any(counts < 0):
            raise ModelInputError("model-year counts must be ≥ 0")
    tr = transitions
    legacy = np.clip(
        (tr.legacy_none_from_year - years) / (tr.legacy_none_from_year - tr.legacy_all_until_year),
        0.0,
        1.0,
    )
    boosted = tr.boosted_new_share_max * np.clip(
        (years - tr.boosted_start_year) / (tr.boosted_full_year - tr.boosted_start_year), 0.0, 1.0
    )
    modern = 1.0 - legacy - boosted
    total = counts.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = {
            name: np.where(total > 0, (counts @ s) / total, np.nan)
            for name, s in (("legacy", legacy), ("modern", modern), ("boosted", boosted))
        }
    return {k: _out(v) for k, v in out.items()}


# ======================================================================= shares and quantiles


def _mixture_cdf(x: np.ndarray, w: np.ndarray, m: np.ndarray, s: np.ndarray) -> np.ndarray:
    return np.sum(w * ndtr((x[..., None] - m) / s), axis=-1)


def share_satisfied(
    grade_aki: ArrayLike,
    mix: Mapping[str, ArrayLike] | ArrayLike,
    params: FleetModelParams,
    conditions: Conditions,
) -> np.ndarray | float:
    """Share of the local fleet a fuel of the given AKI satisfies.

    Parameters
    ----------
    grade_aki : array_like
        Posted AKI of the grade(s) [AKI]; broadcasts against the conditions (pass
        ``conditions`` fields shaped (n, 1) with grades shaped (n, n_grades)).
    mix : mapping or array_like
        Fleet mix (see :func:`mix_array`).
    params : FleetModelParams
    conditions : Conditions

    Returns
    -------
    Share satisfied [-], 0…1; NaN where an input is NaN.

    Notes
    -----
    F(x) = Σ_k w_k·Φ((x − mean_k)/sd_k), the CDF of the fleet's requirement mixture
    (:func:`class_requirement_moments`); exact, no sampling. Monotone non-decreasing in x.
    """
    w = mix_array(mix, params)
    m, s = class_requirement_moments(params, conditions)
    x = _arr(grade_aki)
    # clip: Σ w_k·1 may round to 1 + 2e-16
    return _out(np.clip(np.sum(w * ndtr((x[..., None] - m) / s), axis=-1), 0.0, 1.0))


def _mixture_quantile(
    w: np.ndarray,
    m: np.ndarray,
    s: np.ndarray,
    target: ArrayLike,
    start: ArrayLike | None = None,
    max_iter: int = 100,
) -> np.ndarray:
    """Vectorised quantile of normal mixtures (safeguarded Newton within a bracket).

    ``start`` (optional, broadcast to the result shape) is a first guess, e.g. the nominal
    solution when solving Monte Carlo draws; it is clipped into the bracket.
    """
    w, m, s = np.broadcast_arrays(w, m, s)
    shape = w.shape[:-1]
    t = np.broadcast_to(_arr(target), shape)
    x0f = None if start is None else np.broadcast_to(_arr(start), shape).reshape(-1)
    k = w.shape[-1]
    out = np.full(shape, np.nan)
    wf, mf, sf, tf = w.reshape(-1, k), m.reshape(-1, k), s.reshape(-1, k), t.reshape(-1)
    outf = out.reshape(-1)
    valid = (
        np.all(np.isfinite(wf) & np.isfinite(mf) & np.isfinite(sf), axis=-1)
        & np.all(sf > 0, axis=-1)
        & (tf > 0)
        & (tf < 1)
    )
    idx_all = np.flatnonzero(valid)
    per_chunk = max(1, _CHUNK_ELEMENTS // k)
    for start in range(0, idx_all.size, per_chunk):
        idx = idx_all[start : start + per_chunk]
        tc = tf[idx]
        guess = np.full(idx.size, np.nan) if x0f is None else x0f[idx].astype(float)
        outf[idx] = _newton_quantiles(
            np.ascontiguousarray(wf[idx], dtype=float),
            np.ascontiguousarray(mf[idx], dtype=float),
            np.ascontiguousarray(sf[idx], dtype=float),
            np.ascontiguousarray(tc, dtype=float),
            np.ascontiguousarray(ndtri(tc), dtype=float),
            np.ascontiguousarray(guess),
            max_iter,
        )
    return out


@njit(cache=True, nogil=True)
def _newton_quantiles(w, m, s, t, z_t, guess, max_iter):  # pragma: no cover - compiled
    """Per row i: the x [AKI] with Σ_k w[i,k]·Φ((x − m[i,k])/s[i,k]) = t[i].

    Safeguarded Newton (Press et al., *Numerical Recipes*, 3rd ed., 2007, §9.4, "rtsafe"):
    the root is bracketed by the smallest and largest component quantile m + s·Φ⁻¹(t)
    (``z_t`` = Φ⁻¹(t)) among components of positive weight; a Newton step that leaves the
    bracket is replaced by bisection, and every evaluation narrows the bracket. Starts from
    ``guess`` clipped into the bracket where finite, else from the weighted mean of the
    component quantiles. Φ(z) = erfc(−z/√2)/2, the normal CDF through the complementary
    error function (an identity; accurate in both tails).

    Newton converges quadratically: after a step |δ| ≤ :data:`_NEWTON_ACCEPT_STEP_AKI` the
    remaining error is of order δ²·|F''/2F'| ≪ 1e-9 AKI, so the post-step value is accepted
    without another evaluation (checked against brentq to 1e-8 AKI in the tests)."""
    n, k = w.shape
    out = np.empty(n)
    inv_sqrt_2pi = 1.0 / math.sqrt(2.0 * math.pi)
    inv_sqrt2 = 1.0 / math.sqrt(2.0)
    for i in range(n):
        lo = np.inf
        hi = -np.inf
        x = 0.0
        for c in range(k):
            q = m[i, c] + s[i, c] * z_t[i]
            if w[i, c] > 0:
                lo = min(lo, q)
                hi = max(hi, q)
            x += w[i, c] * q
        if np.isfinite(guess[i]):
            x = min(max(guess[i], lo), hi)
        res = x
        for _ in range(max_iter):
            f = -t[i]
            dens = 0.0
            for c in range(k):
                z = (x - m[i, c]) / s[i, c]
                f += w[i, c] * (0.5 * math.erfc(-z * inv_sqrt2))
                dens += w[i, c] * math.exp(-0.5 * z * z) / s[i, c]
            dens *= inv_sqrt_2pi
            la = x if f < 0 else lo
            ha = x if f > 0 else hi
            newton = False
            xn = 0.5 * (la + ha)
            if dens != 0.0:
                step = x - f / dens
                if la <= step <= ha:
                    xn = step
                    newton = True
            lo, hi = la, ha
            if f == 0:
                res = x
                break
            res = xn
            if (newton and abs(xn - x) <= _NEWTON_ACCEPT_STEP_AKI) or ha - la <= _QUANTILE_TOL_AKI:
                break
            x = xn
        out[i] = res
    return out


def round_up_to_step(aki_value: ArrayLike, step_aki: float = 1.0) -> np.ndarray | float:
    """Round an AKI up to the posting step, as pumps post it.

    Parameters
    ----------
    aki_value : array_like
        Unrounded AKI [AKI]; NaN stays NaN.
    step_aki : float
        Posting step [AKI] (> 0), e.g. 1 or 0.5.

    Returns
    -------
    ⌈(x − ε)/step⌉·step [AKI], ε = 1e-6 AKI so solver round-off just above a step does not bump a
    station to the next grade.

    Examples
    --------
    >>> round_up_to_step([85.6, 86.0, 86.0000000001, np.nan])
    array([86., 86., 86., nan])
    >>> round_up_to_step(85.2, 0.5)
    85.5
    """
    if not step_aki > 0:
        raise ModelInputError(f"posting step must be > 0 AKI (got {step_aki})")
    x = _arr(aki_value)
    return _out(np.round(np.ceil((x - _ROUNDING_SLACK_AKI) / step_aki) * step_aki, 9))


def justified_aki(
    mix: Mapping[str, ArrayLike] | ArrayLike,
    params: FleetModelParams,
    conditions: Conditions,
    target_share: float | None = None,
    step_aki: float | None = None,
) -> JustifiedAki:
    """Justified minimum AKI: the lowest AKI satisfying the target share of the local fleet.

    Parameters
    ----------
    mix : mapping or array_like
        Fleet mix per station (see :func:`mix_array`).
    params : FleetModelParams
    conditions : Conditions
        Design conditions per station (e.g. :func:`design_conditions`).
    target_share : float, optional
        Share of vehicles to satisfy (0…1); default ``params.target_share`` (0.90).
    step_aki : float, optional
        Posting step; default ``params.posting_step_aki`` (1 AKI).

    Returns
    -------
    :class:`JustifiedAki` (``aki`` unrounded, ``posted_aki`` rounded up) [AKI], station shape;
    NaN where an input is NaN. Empty inputs give empty arrays.

    Notes
    -----
    Solves F(x) = target for the fleet mixture CDF F (:func:`share_satisfied`) by a vectorised,
    bracketed Newton iteration (bracket: the smallest and largest class quantile, which the
    mixture quantile always lies between), to 1e-9 AKI.
    """
    t = params.target_share if target_share is None else target_share
    step = params.posting_step_aki if step_aki is None else step_aki
    w = mix_array(mix, params)
    m, s = class_requirement_moments(params, conditions)
    q = _mixture_quantile(w, m, s, t)
    return JustifiedAki(_out(q), round_up_to_step(q, step))


def justified_aki_band(
    mix: Mapping[str, ArrayLike] | ArrayLike,
    params: FleetModelParams,
    conditions: Conditions,
    target_share: float | None = None,
    uncertainty: UncertaintySpec | None = None,
) -> AkiBand:
    """Monte Carlo band of the unrounded justified AKI from coefficient uncertainty.

    Parameters
    ----------
    mix, params, conditions, target_share
        As for :func:`justified_aki`.
    uncertainty : UncertaintySpec, optional
        Spreads, number of draws, seed and band quantiles; default ``params.uncertainty``.

    Returns
    -------
    :class:`AkiBand` (low, median, high) [AKI], station shape; NaN where inputs are NaN.

    Notes
    -----
    Draws the coefficients once (:func:`sample_coefficients`; fixed seed, common to all stations,
    so neighbouring stations are compared on the same draws), evaluates the exact mixture quantile
    for every station × draw (vectorised, chunked), and takes the band quantiles across draws.
    Only coefficient uncertainty: the design day, the fleet mix and the model form are held fixed.
    Cost is linear in stations × draws.
    """
    spec = params.uncertainty if uncertainty is None else uncertainty
    t = params.target_share if target_share is None else target_share
    w = mix_array(mix, params)
    p, tk, hw, load = np.broadcast_arrays(
        _arr(conditions.pressure_pa),
        _arr(conditions.temperature_k),
        _arr(conditions.humidity_g_per_kg),
        np.asarray(conditions.sustained_load, dtype=float),
    )
    shape = np.broadcast_shapes(p.shape, w.shape[:-1])
    p, tk, hw, load = (np.broadcast_to(a, shape).reshape(-1) for a in (p, tk, hw, load))
    wf = np.broadcast_to(w, shape + w.shape[-1:]).reshape(-1, w.shape[-1])
    coef = sample_coefficients(params, spec)
    nominal = _nominal_coefficients(params)
    n = p.size
    lo = np.full(n, np.nan)
    med = np.full(n, np.nan)
    hi = np.full(n, np.nan)
    per_chunk = max(1, _CHUNK_ELEMENTS // spec.draws)
    for a in range(0, n, per_chunk):
        sl = slice(a, a + per_chunk)
        cond = Conditions(p[sl, None], tk[sl, None], hw[sl, None], load[sl, None])
        m, s = _moments(params, coef, cond)  # (chunk, draws, K)
        m0, s0 = _moments(params, nominal, Conditions(p[sl], tk[sl], hw[sl], load[sl]))
        x0 = _mixture_quantile(wf[sl], m0, s0, t)  # nominal solution: first guess for the draws
        q = _mixture_quantile(wf[sl, None, :], m, s, t, start=x0[:, None])
        if np.isnan(q).all():
            continue
        with np.errstate(invalid="ignore"):
            ok = ~np.isnan(q).any(axis=-1)
        if ok.any():
            qq = np.quantile(q[ok], [spec.band_low, 0.5, spec.band_high], axis=-1)
            idx = np.arange(a, min(a + per_chunk, n))[ok]
            lo[idx], med[idx], hi[idx] = qq
    return AkiBand(_out(lo.reshape(shape)), _out(med.reshape(shape)), _out(hi.reshape(shape)))


# =========================================================================== break-even


def break_even_elevation(
    grade_aki: ArrayLike,
    mix: Mapping[str, ArrayLike] | ArrayLike,
    params: FleetModelParams,
    target_share: float | None = None,
    design: DesignDay = DesignDay(),  # noqa: B008
    lower_m: float = -400.0,
    upper_m: float = 5000.0,
    scan_step_m: float = 50.0,
    tol_m: float = 0.01,
) -> BreakEven:
    """Break-even elevation of a grade: below it the grade stops meeting the target share.

    Parameters
    ----------
    grade_aki : array_like
        Posted AKI of the grade [AKI]; broadcasts against the mix's station shape (several
        grades per station: grades shaped (n, n_grades) with a mix array shaped (n, 1, n_classes)).
    mix : mapping or array_like
        Fleet mix (see :func:`mix_array`).
    params : FleetModelParams
    target_share : float, optional
        Default ``params.target_share``.
    design : DesignDay
        Design day evaluated at each trial elevation (standard-atmosphere pressure, temperature by
        the lapse rate plus offset, humidity from the fixed relative humidity by default).
    lower_m, upper_m : float
        Search interval [m]; default −400 … 5,000 m.
    scan_step_m : float
        Spacing of the initial scan [m].
    tol_m : float
        Bisection tolerance [m].

    Returns
    -------
    :class:`BreakEven` with ``elevation_m`` [m] and ``status``:
    ``crossing`` (elevation found), ``meets_everywhere`` (the grade meets the target on the whole
    interval; elevation NaN), ``meets_nowhere`` (fails even at ``upper_m``; elevation NaN),
    ``no_data`` (NaN input; elevation NaN).

    Notes
    -----
    z* = inf{ z : F_z(grade) ≥ target for every z' in [z, upper] }, found by scanning the share
    F_z(grade) (:func:`share_satisfied` at :func:`design_conditions`) from the top on a
    ``scan_step_m`` grid and bisecting the highest failing interval. On a fixed design day
    (temperature and humidity held) the share rises monotonically with elevation for naturally
    aspirated classes and z* is the unique crossing; with a lapse-rate day and fixed relative
    humidity the air also dries with height, which can make the share non-monotone near sea
    level, and z* is then the conservative (highest) crossing. Failing pockets narrower than the
    scan step may be missed.
    """
    if not (upper_m > lower_m and scan_step_m > 0 and tol_m > 0):
        raise ModelInputError(
            "break-even search needs lower_m < upper_m, scan_step_m > 0, tol_m > 0"
        )
    t = params.target_share if target_share is None else target_share
    w = mix_array(mix, params)
    g = _arr(grade_aki)
    shape = np.broadcast_shapes(g.shape, w.shape[:-1])
    g = np.broadcast_to(g, shape).reshape(-1)
    wf = np.broadcast_to(w, shape + w.shape[-1:]).reshape(-1, w.shape[-1])
    coef = _nominal_coefficients(params)

    def meets(z: np.ndarray, gg: np.ndarray, ww: np.ndarray) -> np.ndarray:
        cond = design_conditions(z, design, params.reference)
        m, s = _moments(params, coef, cond)
        return _mixture_cdf(gg, ww, m, s) >= t

    n = g.size
    elev = np.full(n, np.nan)
    status = np.full(n, "no_data", dtype=object)
    valid = np.isfinite(g) & np.all(np.isfinite(wf), axis=-1)
    grid = np.arange(lower_m, upper_m + 0.5 * scan_step_m, scan_step_m)
    grid[-1] = upper_m
    vi = np.flatnonzero(valid)
    if vi.size:
        gv, wv = g[vi], wf[vi]
        last_fail = np.full(vi.size, -1)
        for j, zj in enumerate(grid):
            ok = meets(np.full(vi.size, zj), gv, wv)
            last_fail = np.where(~ok, j, last_fail)
        every = last_fail == -1
        nowhere = last_fail == grid.size - 1
        cross = ~every & ~nowhere
        status[vi[every]] = "meets_everywhere"
        status[vi[nowhere]] = "meets_nowhere"
        ci = np.flatnonzero(cross)
        if ci.size:
            a = grid[last_fail[ci]]  # fails
            b = grid[last_fail[ci] + 1]  # meets
            gc, wc = gv[ci], wv[ci]
            n_iter = math.ceil(math.log2(max(scan_step_m / tol_m, 2.0)))
            for _ in range(n_iter):  # interval halves each step: width scan_step / 2**n ≤ tol
                mid = 0.5 * (a + b)
                ok = meets(mid, gc, wc)
                b = np.where(ok, mid, b)
                a = np.where(ok, a, mid)
            elev[vi[ci]] = 0.5 * (a + b)
            status[vi[ci]] = "crossing"
    elev = elev.reshape(shape)
    status = status.astype(str).reshape(shape)
    if elev.ndim == 0:
        return BreakEven(float(elev), str(status))
    return BreakEven(elev, status)


# ================================================================================ DEM grids


def justified_aki_grid(
    elevation_m: ArrayLike,
    mix: Mapping[str, ArrayLike] | ArrayLike,
    params: FleetModelParams,
    target_share: float | None = None,
    design: DesignDay = DesignDay(),  # noqa: B008
) -> np.ndarray:
    """Unrounded justified AKI over a DEM grid.

    Parameters
    ----------
    elevation_m : ndarray, 2-D (any shape works)
        Geometric elevation [m]; NaN for nodata.
    mix : mapping or array_like
        Fleet mix: one mix for the whole grid (mapping of scalars), or per cell (mapping of arrays
        shaped like the grid, e.g. rasterised fleet zones, or an array grid.shape + (n_classes,)).
    params : FleetModelParams
    target_share : float, optional
        Default ``params.target_share``.
    design : DesignDay
        Design day (:func:`design_conditions`).

    Returns
    -------
    Justified AKI [AKI], unrounded, shaped like ``elevation_m``; NaN where the elevation (or the
    mix) is NaN.

    Notes
    -----
    Same solve as :func:`justified_aki`, only on valid cells, chunked (memory stays bounded for
    multi-million-cell grids). Round with :func:`round_up_to_step` or band with
    :func:`classify_bands`.
    """
    t = params.target_share if target_share is None else target_share
    z = _arr(elevation_m)
    w = mix_array(mix, params)
    w = np.broadcast_to(w, z.shape + w.shape[-1:])
    out = np.full(z.shape, np.nan)
    valid = np.isfinite(z) & np.all(np.isfinite(w), axis=-1)
    if not valid.any():
        return out
    zv = z[valid]
    wv = w[valid]
    coef = _nominal_coefficients(params)
    res = np.empty(zv.size)
    for a in range(0, zv.size, _CHUNK_ELEMENTS):
        sl = slice(a, a + _CHUNK_ELEMENTS)
        cond = design_conditions(zv[sl], design, params.reference)
        m, s = _moments(params, coef, cond)
        res[sl] = _mixture_quantile(wv[sl], m, s, t)
    out[valid] = res
    return out


def classify_bands(values: ArrayLike, edges: ArrayLike = (85.0, 86.0, 87.0)) -> np.ndarray:
    """Band codes of justified-AKI values.

    Parameters
    ----------
    values : array_like
        Unrounded justified AKI [AKI]; NaN for nodata.
    edges : array_like
        Strictly ascending band edges [AKI], default (85, 86, 87).

    Returns
    -------
    int16 codes, shaped like ``values``: 0 for v ≤ e0, i for e(i−1) < v ≤ e(i), len(edges) for
    v > e(last), −1 for NaN. Labels: :func:`band_labels`.

    Notes
    -----
    Intervals are closed on the right because a posted grade g serves every place whose justified
    AKI is ≤ g: a cell needing exactly 86.0 is served by 86 and falls in "85–86". Hence the top
    band is "> 87" (needs more than 87), not "≥ 87".

    Examples
    --------
    >>> classify_bands([84.2, 85.0, 85.01, 86.0, 87.0, 87.2, np.nan]).tolist()
    [0, 0, 1, 1, 2, 3, -1]
    """
    e = _arr(edges)
    if e.ndim != 1 or e.size == 0 or np.any(np.diff(e) <= 0):
        raise ModelInputError("band edges must be a non-empty, strictly ascending 1-D sequence")
    v = _arr(values)
    codes = np.digitize(v, e, right=True).astype(np.int16)
    return np.where(np.isnan(v), np.int16(-1), codes).astype(np.int16)


def _fmt_aki(x: float) -> str:
    return f"{x:g}"


def band_labels(edges: ArrayLike = (85.0, 86.0, 87.0)) -> list[str]:
    """Labels of the codes of :func:`classify_bands`, index = code:
    ``["≤85", "85–86", "86–87", ">87"]`` for the default edges (code −1 is "no data")."""
    e = [float(x) for x in np.atleast_1d(_arr(edges))]
    labels = [f"≤{_fmt_aki(e[0])}"]
    labels += [f"{_fmt_aki(a)}–{_fmt_aki(b)}" for a, b in zip(e[:-1], e[1:], strict=True)]
    labels.append(f">{_fmt_aki(e[-1])}")
    return labels


# ========================================================================= requirement curve


def requirement_curve(
    elevations_m: ArrayLike,
    params: FleetModelParams,
    mix: Mapping[str, float] | ArrayLike = DEFAULT_FLEET_MIX,
    target_share: float | None = None,
    design: DesignDay = DesignDay(),  # noqa: B008
) -> pd.DataFrame:
    """Requirement versus elevation per engine class and for the fleet (for report plots).

    Parameters
    ----------
    elevations_m : array_like
        Geometric elevations [m], 1-D.
    params : FleetModelParams
    mix : mapping or array_like
        One fleet mix (class → share), applied at every elevation.
    target_share : float, optional
        Default ``params.target_share``.
    design : DesignDay

    Returns
    -------
    DataFrame, one row per elevation, columns: ``elevation_m``, ``pressure_kpa``,
    ``temperature_c``, ``humidity_ratio_g_per_kg``; per class ``<class>_median_aki`` and
    ``<class>_target_aki`` (the class's own target-share requirement); ``fleet_median_aki`` and
    ``fleet_target_aki`` (mixture; ``fleet_target_aki`` is the unrounded justified AKI) and
    ``fleet_posted_aki`` (rounded up). ``df.attrs`` records target_share, mix and design.
    """
    t = params.target_share if target_share is None else target_share
    z = np.atleast_1d(_arr(elevations_m)).reshape(-1)
    cond = design_conditions(z, design, params.reference)
    m, s = class_requirement_moments(params, cond)
    w = mix_array(mix, params)
    zt = float(ndtri(t))
    data: dict[str, Any] = {
        "elevation_m": z,
        "pressure_kpa": _arr(cond.pressure_pa) / _PA_PER_KPA,
        "temperature_c": _arr(cond.temperature_k) - ZERO_C_K,
        "humidity_ratio_g_per_kg": _arr(cond.humidity_g_per_kg),
    }
    for i, name in enumerate(params.classes):
        data[f"{name}_median_aki"] = m[..., i]
        data[f"{name}_target_aki"] = m[..., i] + zt * s[..., i]
    data["fleet_median_aki"] = _mixture_quantile(w, m, s, 0.5)
    fleet = _mixture_quantile(w, m, s, t)
    data["fleet_target_aki"] = fleet
    data["fleet_posted_aki"] = _arr(round_up_to_step(fleet, params.posting_step_aki))
    df = pd.DataFrame(data)
    df.attrs["target_share"] = t
    df.attrs["mix"] = {n: float(v) for n, v in zip(params.classes, np.ravel(w), strict=False)}
    df.attrs["design"] = design.model_dump()
    return df
