"""Barometric pressure, design-day temperature and humidity at a station's elevation.

Pure, vectorised functions: scalars or numpy arrays in, numpy arrays (or floats) out, NaN passes
through. SI inside: metres, pascals, kelvin.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from pipeline.constants import (
    EPSILON_WATER_AIR,
    G0_M_S2,
    LAPSE_K_PER_M,
    M0_KG_MOL,
    P0_PA,
    PA_PER_PSI,
    R0_EARTH_M,
    R_STAR_J_MOL_K,
    T0_K,
    TROPOPAUSE_H_M,
    ZERO_C_K,
)

__all__ = [
    "geopotential_height_m",
    "geometric_height_m",
    "standard_pressure_pa",
    "standard_temperature_k",
    "design_temperature_k",
    "pressure_altitude_m",
    "saturation_vapour_pressure_pa",
    "specific_humidity_g_per_kg",
    "humidity_ratio_g_per_kg",
    "pa_to_kpa",
    "pa_to_psi",
]

#: Exponent g0·M0/(R*·L) of the layer-0 barometric formula (≈ 5.255 876).
_BARO_EXPONENT = G0_M_S2 * M0_KG_MOL / (R_STAR_J_MOL_K * LAPSE_K_PER_M)


def _as_float_array(x: ArrayLike) -> np.ndarray:
    return np.asarray(x, dtype=float)


def _maybe_scalar(x: np.ndarray):
    return float(x) if x.ndim == 0 else x


def geopotential_height_m(z_m: ArrayLike) -> np.ndarray | float:
    """Geopotential height from geometric elevation.

    Parameters
    ----------
    z_m : array_like
        Geometric elevation above mean sea level [m] (what a DEM gives).

    Returns
    -------
    Geopotential height [m'].

    Notes
    -----
    H = r0·z / (r0 + z), r0 = 6 356 766 m. Skipping this step errs by ~20 Pa at 4 km.

    References
    ----------
    US Standard Atmosphere 1976 (NOAA-S/T 76-1562), eq. 18.
    """
    z = _as_float_array(z_m)
    return _maybe_scalar(R0_EARTH_M * z / (R0_EARTH_M + z))


def geometric_height_m(h_m: ArrayLike) -> np.ndarray | float:
    """Geometric elevation [m] from geopotential height [m']; inverse of
    :func:`geopotential_height_m` (z = r0·H / (r0 − H)). US Standard Atmosphere 1976, eq. 19."""
    h = _as_float_array(h_m)
    return _maybe_scalar(R0_EARTH_M * h / (R0_EARTH_M - h))


def standard_pressure_pa(z_m: ArrayLike) -> np.ndarray | float:
    """Static pressure of the US Standard Atmosphere 1976 at a geometric elevation.

    Parameters
    ----------
    z_m : array_like
        Geometric elevation above mean sea level [m]; valid below the tropopause
        (H < 11 000 m'); −5 000 m' and above is the table's own lower limit. NaN gives NaN.

    Returns
    -------
    Pressure [Pa]. Elevations outside −5 000 m' … 11 000 m' give NaN.

    Notes
    -----
    P = P0 · (1 − L·H/T0) ^ (g0·M0 / (R*·L)),  H geopotential height.
    P0 = 101 325 Pa, T0 = 288.15 K, L = 0.0065 K/m', exponent ≈ 5.255 876.
    Assumes the standard atmosphere: real weather moves station pressure by a few percent.

    References
    ----------
    US Standard Atmosphere 1976 (NOAA-S/T 76-1562), eq. 33a; identical to the ICAO standard
    atmosphere below 32 km.
    """
    h = _as_float_array(geopotential_height_m(z_m))
    with np.errstate(invalid="ignore"):
        p = P0_PA * (1.0 - LAPSE_K_PER_M * h / T0_K) ** _BARO_EXPONENT
        p = np.where((h >= -5000.0) & (h <= TROPOPAUSE_H_M), p, np.nan)
    return _maybe_scalar(p)


def pressure_altitude_m(p_pa: ArrayLike) -> np.ndarray | float:
    """Geometric elevation [m] at which the 1976 standard atmosphere has pressure ``p_pa`` [Pa].

    Inverse of :func:`standard_pressure_pa` (layer 0):
    H = T0/L · (1 − (P/P0)^(1/exponent)), then z from H. US Standard Atmosphere 1976, eq. 33a.
    """
    p = _as_float_array(p_pa)
    with np.errstate(invalid="ignore", divide="ignore"):
        h = T0_K / LAPSE_K_PER_M * (1.0 - (p / P0_PA) ** (1.0 / _BARO_EXPONENT))
    return geometric_height_m(h)


def standard_temperature_k(z_m: ArrayLike) -> np.ndarray | float:
    """Temperature of the US Standard Atmosphere 1976 [K] at geometric elevation ``z_m`` [m]:
    T = T0 − L·H (layer 0). US Standard Atmosphere 1976, eq. 23."""
    h = _as_float_array(geopotential_height_m(z_m))
    t = T0_K - LAPSE_K_PER_M * h
    return _maybe_scalar(np.where(h <= TROPOPAUSE_H_M, t, np.nan))


def design_temperature_k(z_m: ArrayLike, offset_k: ArrayLike = 0.0) -> np.ndarray | float:
    """Design-day ambient temperature [K]: the standard lapse-rate temperature plus an offset.

    Parameters
    ----------
    z_m : array_like
        Geometric elevation [m].
    offset_k : array_like
        Offset from the standard atmosphere [K]; e.g. +20 K for a hot summer design day
        (35 °C at sea level). A planning choice, not a climate statistic.

    Notes
    -----
    T = T0 − L·H + ΔT. The offset leaves pressure on the standard curve (the usual
    "ISA + ΔT" convention: pressure by the standard atmosphere, temperature shifted).
    """
    t = _as_float_array(standard_temperature_k(z_m)) + _as_float_array(offset_k)
    return _maybe_scalar(t)


def saturation_vapour_pressure_pa(t_k: ArrayLike) -> np.ndarray | float:
    """Saturation vapour pressure of water over liquid water [Pa] at temperature ``t_k`` [K].

    Notes
    -----
    Hyland–Wexler formulation as given in ASHRAE Handbook Fundamentals (2017), ch. 1, eq. 6
    (over liquid water, 0 … 200 °C); used here also slightly below 0 °C (supercooled water),
    where it stays within 0.5 % of the ice formula's humidity effect for the design-day use.

    References
    ----------
    ASHRAE Handbook — Fundamentals (SI), 2017, chapter 1, eq. 6; Hyland & Wexler (1983).
    """
    t = _as_float_array(t_k)
    c8, c9, c10 = -5.8002206e3, 1.3914993e0, -4.8640239e-2
    c11, c12, c13 = 4.1764768e-5, -1.4452093e-8, 6.5459673e0
    with np.errstate(invalid="ignore", divide="ignore"):
        ln_p = c8 / t + c9 + c10 * t + c11 * t**2 + c12 * t**3 + c13 * np.log(t)
    return _maybe_scalar(np.exp(ln_p))


def humidity_ratio_g_per_kg(
    t_k: ArrayLike, relative_humidity: ArrayLike, p_pa: ArrayLike
) -> np.ndarray | float:
    """Humidity ratio (mixing ratio) [g water per kg dry air].

    Parameters
    ----------
    t_k : ambient (dry-bulb) temperature [K]
    relative_humidity : relative humidity as a fraction 0…1
    p_pa : total (barometric) pressure [Pa]

    Notes
    -----
    W = ε · pw / (p − pw), pw = RH · pws(T), ε = 0.621 945.
    ASHRAE Handbook Fundamentals (2017), ch. 1, eqs. 20, 22 and 24.
    """
    rh = _as_float_array(relative_humidity)
    pw = rh * _as_float_array(saturation_vapour_pressure_pa(t_k))
    p = _as_float_array(p_pa)
    with np.errstate(invalid="ignore", divide="ignore"):
        w = EPSILON_WATER_AIR * pw / (p - pw)
    return _maybe_scalar(1000.0 * w)


def specific_humidity_g_per_kg(
    t_k: ArrayLike, relative_humidity: ArrayLike, p_pa: ArrayLike
) -> np.ndarray | float:
    """Specific humidity [g water per kg moist air]: q = W / (1 + W) with W the humidity ratio.

    ASHRAE Handbook Fundamentals (2017), ch. 1, eq. 9b. Octane-requirement correlations are
    usually stated per g water per kg *dry* air, i.e. the humidity ratio
    (:func:`humidity_ratio_g_per_kg`); at design-day values the two differ by under 2 %.
    """
    w = _as_float_array(humidity_ratio_g_per_kg(t_k, relative_humidity, p_pa)) / 1000.0
    return _maybe_scalar(1000.0 * w / (1.0 + w))


def pa_to_kpa(p_pa: ArrayLike) -> np.ndarray | float:
    """Pascal → kilopascal."""
    return _maybe_scalar(_as_float_array(p_pa) / 1000.0)


def pa_to_psi(p_pa: ArrayLike) -> np.ndarray | float:
    """Pascal → pound-force per square inch (absolute); 1 psi = 6 894.757 Pa (NIST SP 811)."""
    return _maybe_scalar(_as_float_array(p_pa) / PA_PER_PSI)


def celsius(t_k: ArrayLike) -> np.ndarray | float:
    """Kelvin → degrees Celsius."""
    return _maybe_scalar(_as_float_array(t_k) - ZERO_C_K)
