"""Atmosphere: pressure, temperature and humidity against outside references."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline import atmosphere as atm
from pipeline.constants import FT_TO_M

# US Standard Atmosphere 1976 (NOAA-S/T 76-1562), Table I, geometric altitude; values as
# reproduced in ../shared/DOMAIN.md §1. Tolerance: the table's printed precision.
TABLE_1976 = [  # (z m, kPa, psia)
    (0.0, 101.325, 14.696),
    (1000.0, 89.876, 13.035),
    (2000.0, 79.501, 11.531),
    (3000.0, 70.121, 10.170),
    (4000.0, 61.660, 8.943),
]

ELEVATIONS_M = np.linspace(-400.0, 5000.0, 28)  # ≥ 20 elevations across the range


@pytest.mark.parametrize(("z", "kpa", "psi"), TABLE_1976)
def test_pressure_matches_1976_table(z, kpa, psi):
    p = atm.standard_pressure_pa(z)
    assert atm.pa_to_kpa(p) == pytest.approx(kpa, abs=0.0015)
    assert atm.pa_to_psi(p) == pytest.approx(psi, abs=0.0015)


def test_pressure_matches_fluids_1976():
    """Oracle: fluids.atmosphere.ATMOSPHERE_1976 (Caleb Bell, ChEDL), geometric Z."""
    fluids = pytest.importorskip("fluids.atmosphere")
    ref = np.array([fluids.ATMOSPHERE_1976(z).P for z in ELEVATIONS_M])
    got = atm.standard_pressure_pa(ELEVATIONS_M)
    np.testing.assert_allclose(got, ref, rtol=5e-5)


def test_pressure_and_temperature_match_ambiance():
    """Oracle: ambiance.Atmosphere (ICAO standard atmosphere 1993 = USSA 1976 below 32 km)."""
    ambiance = pytest.importorskip("ambiance")
    ref = ambiance.Atmosphere(ELEVATIONS_M)
    np.testing.assert_allclose(atm.standard_pressure_pa(ELEVATIONS_M), ref.pressure, rtol=5e-5)
    np.testing.assert_allclose(atm.standard_temperature_k(ELEVATIONS_M), ref.temperature, rtol=5e-5)
    np.testing.assert_allclose(atm.geopotential_height_m(ELEVATIONS_M), ref.H, rtol=5e-5, atol=1e-3)


def test_geopotential_step_matters():
    """Skipping geometric → geopotential errs by ~20 Pa at 4 km (DOMAIN.md §1): check that the
    implementation does take the step (a plain-H formula would be this far off)."""
    h_as_z = 101325.0 * (1 - 0.0065 * 4000.0 / 288.15) ** 5.255876
    assert abs(atm.standard_pressure_pa(4000.0) - h_as_z) > 10.0


# Facts of the trade — common practice, no source.
@pytest.mark.parametrize(
    ("feet", "psi", "bar", "tol_psi"),
    [(0, 14.7, 1.013, 0.05), (5000, 12.2, 0.83, 0.1), (10000, 10.2, 0.70, 0.15)],
)
def test_trade_pressure_facts(feet, psi, bar, tol_psi):
    p = atm.standard_pressure_pa(feet * FT_TO_M)
    assert atm.pa_to_psi(p) == pytest.approx(psi, abs=tol_psi)
    assert p / 1e5 == pytest.approx(bar, abs=0.015)


def test_about_30_percent_less_air_at_10000_ft():
    """Common practice, no source: roughly 30 % less air (pressure) at 10,000 ft."""
    ratio = atm.standard_pressure_pa(10000 * FT_TO_M) / atm.standard_pressure_pa(0.0)
    assert 1 - ratio == pytest.approx(0.30, abs=0.02)


def test_pressure_altitude_inverts_pressure():
    p = atm.standard_pressure_pa(ELEVATIONS_M)
    np.testing.assert_allclose(atm.pressure_altitude_m(p), ELEVATIONS_M, atol=1e-6)


def test_nan_and_scalars_pass_through():
    assert np.isnan(atm.standard_pressure_pa(np.nan))
    out = atm.standard_pressure_pa(np.array([0.0, np.nan]))
    assert np.isfinite(out[0]) and np.isnan(out[1])
    assert isinstance(atm.standard_pressure_pa(100.0), float)
    assert atm.standard_pressure_pa(np.array([])).shape == (0,)


def test_design_temperature_is_lapse_plus_offset():
    # T0 = 288.15 K, L = 6.5 K/km' (USSA 1976) → at H = 2000 m' 275.15 K; +15 K offset.
    z = atm.geometric_height_m(2000.0)
    assert atm.design_temperature_k(z, 15.0) == pytest.approx(275.15 + 15.0, abs=1e-9)


@pytest.mark.parametrize(
    ("t_c", "rh", "p_pa"), [(30, 0.5, 101325), (10, 0.3, 75000), (-2, 0.8, 70000), (40, 0.1, 85000)]
)
def test_humidity_ratio_matches_psychrolib(t_c, rh, p_pa):
    """Oracle: psychrolib (ASHRAE Handbook Fundamentals 2017 formulation), SI units."""
    psychrolib = pytest.importorskip("psychrolib")
    psychrolib.SetUnitSystem(psychrolib.SI)
    ref = psychrolib.GetHumRatioFromRelHum(t_c, rh, p_pa) * 1000
    got = atm.humidity_ratio_g_per_kg(t_c + 273.15, rh, p_pa)
    # psychrolib switches to the over-ice formula below 0 °C; this module stays over water.
    assert got == pytest.approx(ref, rel=0.02 if t_c < 0 else 1e-6)


def test_specific_humidity_below_humidity_ratio():
    w = atm.humidity_ratio_g_per_kg(303.15, 0.6, 101325.0)
    q = atm.specific_humidity_g_per_kg(303.15, 0.6, 101325.0)
    assert q == pytest.approx(w / (1 + w / 1000), rel=1e-12)
