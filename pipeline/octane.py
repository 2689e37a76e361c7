"""Octane-number definitions and conversions: AKI, RON, MON, sensitivity and linear blending.

Pure, vectorised functions: scalars or numpy arrays in, numpy arrays (or floats) out; NaN passes
through. Octane numbers are dimensionless (ON); the pump-posted North American value is the
Anti-Knock Index AKI = (RON + MON)/2.

| quantity | symbol | definition | source |
|---|---|---|---|
| Research octane number | RON | ASTM D2699 engine test | ASTM D2699 |
| Motor octane number | MON | ASTM D2700 engine test | ASTM D2700 |
| Anti-Knock Index | AKI | (RON + MON)/2, posted on pumps | ASTM D4814 |
| sensitivity | S | RON − MON; ≈ 8–10 for regular grades | common practice (from memory) |
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from pipeline.errors import AltigradeError

__all__ = [
    "DEFAULT_SENSITIVITY",
    "ETHANOL_BLENDING_AKI",
    "ModelInputError",
    "aki",
    "sensitivity",
    "ron_from_aki",
    "mon_from_aki",
    "aki_from_ron",
    "aki_from_mon",
    "blend_linear",
]

#: Default sensitivity S = RON − MON of a regular gasoline [ON]; common practice (from memory):
#: regular grades run S ≈ 8–10.
DEFAULT_SENSITIVITY = 9.0

#: Effective blending value of fuel ethanol in a gasoline blend [AKI]; common practice
#: (from memory). A *blending* value, valid near 10 % by volume, not the neat fuel's octane.
ETHANOL_BLENDING_AKI = 115.0


#: Round-off allowed outside 0…1 in a blend fraction (clipped, not rejected).
_FRACTION_SLACK = 1e-9


class ModelInputError(AltigradeError, ValueError):
    """An input to a calculation is invalid (not merely missing: missing values give NaN)."""


def _arr(x: ArrayLike) -> np.ndarray:
    return np.asarray(x, dtype=float)


def _out(x: np.ndarray) -> np.ndarray | float:
    return float(x) if x.ndim == 0 else x


def aki(ron: ArrayLike, mon: ArrayLike) -> np.ndarray | float:
    """Anti-Knock Index from research and motor octane numbers.

    Parameters
    ----------
    ron : array_like
        Research octane number [ON] (ASTM D2699).
    mon : array_like
        Motor octane number [ON] (ASTM D2700).

    Returns
    -------
    AKI [ON], broadcast shape of the inputs; NaN where either input is NaN.

    Notes
    -----
    AKI = (RON + MON) / 2 — the "(R+M)/2" posted on North American pumps.

    References
    ----------
    ASTM D4814, Standard Specification for Automotive Spark-Ignition Engine Fuel (antiknock index).

    Examples
    --------
    >>> aki(91.0, 83.0)
    87.0
    >>> aki([91.0, np.nan], 83.0)
    array([87., nan])
    """
    return _out((_arr(ron) + _arr(mon)) / 2.0)


def sensitivity(ron: ArrayLike, mon: ArrayLike) -> np.ndarray | float:
    """Fuel sensitivity S = RON − MON [ON] (common practice)."""
    return _out(_arr(ron) - _arr(mon))


def ron_from_aki(
    aki_on: ArrayLike, sensitivity: ArrayLike = DEFAULT_SENSITIVITY
) -> np.ndarray | float:
    """RON implied by an AKI and an assumed sensitivity.

    Parameters
    ----------
    aki_on : array_like
        Anti-Knock Index [ON].
    sensitivity : array_like
        S = RON − MON [ON]; default 9 (common practice for regular grades, from memory).

    Returns
    -------
    RON [ON].

    Notes
    -----
    From AKI = (RON + MON)/2 and S = RON − MON: RON = AKI + S/2.

    References
    ----------
    ASTM D4814 (AKI definition); sensitivity default from memory.

    Examples
    --------
    >>> ron_from_aki(87.0)
    91.5
    """
    return _out(_arr(aki_on) + _arr(sensitivity) / 2.0)


def mon_from_aki(
    aki_on: ArrayLike, sensitivity: ArrayLike = DEFAULT_SENSITIVITY
) -> np.ndarray | float:
    """MON implied by an AKI and an assumed sensitivity: MON = AKI − S/2 [ON].

    See :func:`ron_from_aki` for parameters; ASTM D4814 definition, sensitivity from memory.

    Examples
    --------
    >>> mon_from_aki(87.0, sensitivity=8.0)
    83.0
    """
    return _out(_arr(aki_on) - _arr(sensitivity) / 2.0)


def aki_from_ron(
    ron: ArrayLike, sensitivity: ArrayLike = DEFAULT_SENSITIVITY
) -> np.ndarray | float:
    """AKI implied by a RON and an assumed sensitivity: AKI = RON − S/2 [ON].

    Parameters
    ----------
    ron : array_like
        Research octane number [ON].
    sensitivity : array_like
        S = RON − MON [ON]; default 9 (from memory).

    Returns
    -------
    AKI [ON].

    Notes
    -----
    Inverse of :func:`ron_from_aki`. Useful to read a RON-labelled fuel (as posted outside North
    America) on the AKI scale; the answer is only as good as the assumed S.

    Examples
    --------
    >>> aki_from_ron(95.0, sensitivity=10.0)
    90.0
    """
    return _out(_arr(ron) - _arr(sensitivity) / 2.0)


def aki_from_mon(
    mon: ArrayLike, sensitivity: ArrayLike = DEFAULT_SENSITIVITY
) -> np.ndarray | float:
    """AKI implied by a MON and an assumed sensitivity: AKI = MON + S/2 [ON] (from memory: S)."""
    return _out(_arr(mon) + _arr(sensitivity) / 2.0)


def blend_linear(
    octane_a: ArrayLike, octane_b: ArrayLike, fraction_b: ArrayLike
) -> np.ndarray | float:
    """Octane number of a two-component blend, linear by volume.

    Parameters
    ----------
    octane_a : array_like
        Octane number of component A [ON] — RON, MON or AKI (use one scale for both).
    octane_b : array_like
        (Blending) octane number of component B [ON], same scale.
    fraction_b : array_like
        Volume fraction of component B, 0…1.

    Returns
    -------
    Octane number of the blend [ON], same scale as the inputs; NaN where any input is NaN.

    Raises
    ------
    ModelInputError
        If a (non-NaN) fraction lies outside 0…1 by more than 1e-9 (round-off within that is
        clipped).

    Notes
    -----
    ON_blend = (1 − x_b)·ON_a + x_b·ON_b.

    Applied to RON and MON separately, or to AKI directly: because AKI is itself linear in RON and
    MON, the two routes give the same AKI under linear blending. They differ only once non-linear
    blending corrections (interaction terms, which refining textbooks add for aromatics, olefins
    and oxygenates) are applied — not modelled here. For ethanol use a *blending* octane number
    (≈115 AKI near 10 % by volume, :data:`ETHANOL_BLENDING_AKI`), not the neat fuel's rating;
    the blending value itself varies with the base gasoline and the fraction.

    References
    ----------
    Linear volumetric blending: common practice (refining textbooks; from memory). Ethanol
    blending value ≈115: common practice, from memory.

    Examples
    --------
    >>> round(blend_linear(84.0, ETHANOL_BLENDING_AKI, 0.10), 2)
    87.1
    """
    a, b, x = _arr(octane_a), _arr(octane_b), _arr(fraction_b)
    with np.errstate(invalid="ignore"):
        bad = (x < -_FRACTION_SLACK) | (x > 1.0 + _FRACTION_SLACK)
    if np.any(bad):
        raise ModelInputError(
            f"blend fraction must lie in 0…1; got {x[bad].ravel()[:3].tolist()} "
            f"({int(np.count_nonzero(bad))} value(s) out of range)"
        )
    x = np.clip(x, 0.0, 1.0)  # absorbs round-off within the slack; NaN stays NaN
    return _out((1.0 - x) * a + x * b)
