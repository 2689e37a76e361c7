"""Octane definitions and blending against the published definitions and trade practice."""

from __future__ import annotations

import doctest

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline import octane
from pipeline.errors import AltigradeError
from pipeline.octane import (
    ETHANOL_BLENDING_AKI,
    ModelInputError,
    aki,
    aki_from_mon,
    aki_from_ron,
    blend_linear,
    mon_from_aki,
    ron_from_aki,
    sensitivity,
)

octane_numbers = st.floats(min_value=60.0, max_value=130.0, allow_nan=False)
fractions = st.floats(min_value=0.0, max_value=1.0, allow_nan=False)


def test_aki_definition_astm_d4814():
    """ASTM D4814 posting definition: AKI = (RON + MON)/2, so RON 91 / MON 83 posts as 87."""
    assert aki(91.0, 83.0) == pytest.approx(87.0, abs=1e-12)


def test_ethanol_e10_on_84_blendstock():
    """Common practice: 90 % of an 84-AKI blendstock + 10 % ethanol (blending value 115)
    ≈ 87.1 AKI. Tolerance 0.05 AKI (the value is quoted to one decimal)."""
    assert ETHANOL_BLENDING_AKI == 115.0
    assert blend_linear(84.0, ETHANOL_BLENDING_AKI, 0.10) == pytest.approx(87.1, abs=0.05)


def test_sensitivity_default_and_round_trip():
    """S = RON − MON; default S = 9 (common practice, from memory): 87 AKI ↔ RON 91.5, MON 82.5."""
    assert ron_from_aki(87.0) == pytest.approx(91.5)
    assert mon_from_aki(87.0) == pytest.approx(82.5)
    assert sensitivity(ron_from_aki(87.0), mon_from_aki(87.0)) == pytest.approx(9.0)
    assert aki(ron_from_aki(87.0, 8.0), mon_from_aki(87.0, 8.0)) == pytest.approx(87.0)


@given(octane_numbers, st.floats(min_value=0.0, max_value=15.0))
@settings(max_examples=100, deadline=None)
def test_conversions_invert(a, s):
    """aki_from_ron ∘ ron_from_aki and aki_from_mon ∘ mon_from_aki are identities (definition)."""
    assert aki_from_ron(ron_from_aki(a, s), s) == pytest.approx(a, abs=1e-9)
    assert aki_from_mon(mon_from_aki(a, s), s) == pytest.approx(a, abs=1e-9)


@given(octane_numbers, octane_numbers, octane_numbers, octane_numbers, fractions)
@settings(max_examples=100, deadline=None)
def test_blending_ron_mon_separately_equals_blending_aki(ron_a, mon_a, ron_b, mon_b, x):
    """Linear blending commutes with AKI = (RON+MON)/2 (a consequence of the definitions)."""
    separate = aki(blend_linear(ron_a, ron_b, x), blend_linear(mon_a, mon_b, x))
    direct = blend_linear(aki(ron_a, mon_a), aki(ron_b, mon_b), x)
    assert separate == pytest.approx(direct, abs=1e-9)


@given(octane_numbers, octane_numbers, fractions)
@settings(max_examples=100, deadline=None)
def test_blend_lies_between_components(a, b, x):
    """A linear blend lies between its components (definition)."""
    y = blend_linear(a, b, x)
    assert min(a, b) - 1e-9 <= y <= max(a, b) + 1e-9


def test_blend_endpoints():
    assert blend_linear(84.0, 115.0, 0.0) == 84.0
    assert blend_linear(84.0, 115.0, 1.0) == 115.0
    # round-off just outside 0…1 (e.g. a computed share 1 + 2e-16) is clipped, not rejected
    assert blend_linear(84.0, 115.0, 1.0 + 2e-16) == 115.0
    assert blend_linear(84.0, 115.0, -1e-12) == 84.0


@pytest.mark.parametrize("bad", [-0.01, 1.01, [0.2, 1.5]])
def test_blend_fraction_out_of_range_raises(bad):
    with pytest.raises(ModelInputError, match="0…1") as info:
        blend_linear(84.0, 115.0, bad)
    assert isinstance(info.value, AltigradeError) and isinstance(info.value, ValueError)


@pytest.mark.parametrize(
    "func", [aki, sensitivity, ron_from_aki, mon_from_aki, aki_from_ron, aki_from_mon]
)
def test_input_kinds(func):
    """Scalar in → float out; arrays keep shape; NaN passes through; empty stays empty."""
    assert isinstance(func(87.0, 9.0), float)
    out = func(np.array([87.0, np.nan, 91.0]), 9.0)
    assert out.shape == (3,) and np.isnan(out[1]) and np.isfinite(out[[0, 2]]).all()
    assert func(np.array([]), 9.0).shape == (0,)


def test_blend_input_kinds():
    out = blend_linear(np.array([84.0, np.nan]), 115.0, np.array([0.1, 0.1]))
    assert out[0] == pytest.approx(87.1) and np.isnan(out[1])
    assert np.isnan(blend_linear(84.0, 115.0, np.nan))  # NaN fraction: missing, not invalid
    assert blend_linear(np.array([]), 115.0, 0.1).shape == (0,)


def test_doctests():
    """The docstring examples run (they include edge cases)."""
    result = doctest.testmod(octane, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0 and result.failed == 0
