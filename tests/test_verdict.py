"""The verdict rule at its boundaries, against a tolerance computed by hand from the meter-accuracy rule.

Outside reference: the instrument tolerance rule of /work/shared/field-reference.md section 4.2,
``|meas - pred| <= k_class * FS + k_rdg * |reading| + n * LSB``, computed by hand below for the demo
bench's voltage sensor VA (0.5 % of reading, 0.2 % of full scale, 2 digits of 0.1 V, 200 V range).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from labkit.core.bench import Accuracy
from labkit.session.verdict import MARGINAL_FACTOR, instrument_tolerance, template_tolerance, verdict, verdicts

VA = Accuracy(reading=0.005, full_scale=0.002, digits=2, resolution=0.1)
# field-reference §4.2 by hand at a reading of 118.6 V: 0.002 * 200 + 0.005 * 118.6 + 2 * 0.1
HAND_TOL = 0.4 + 0.593 + 0.2


def test_instrument_tolerance_matches_the_hand_computed_meter_rule():
    assert instrument_tolerance(VA, 118.6, 200.0) == pytest.approx(HAND_TOL, abs=1e-12)
    assert instrument_tolerance(VA, -118.6, 200.0) == pytest.approx(HAND_TOL, abs=1e-12)  # |reading|
    # no range known: the class term drops out
    assert instrument_tolerance(VA, 118.6, math.nan) == pytest.approx(0.593 + 0.2, abs=1e-12)


@pytest.mark.parametrize(("band_low", "expected"), [
    (118.6 + HAND_TOL, "accept"),                       # exactly tol below the band: accept (inclusive)
    (118.6 + HAND_TOL + 1e-6, "marginal"),              # just beyond
    (118.6 + MARGINAL_FACTOR * HAND_TOL, "marginal"),   # exactly k * tol below: still marginal
    (118.6 + MARGINAL_FACTOR * HAND_TOL + 1e-6, "outside"),
])
def test_boundaries_below_the_band(band_low, expected):
    tol = instrument_tolerance(VA, 118.6, 200.0)
    assert verdict(118.6, band_low, band_low + 0.5, tol) == expected


@pytest.mark.parametrize(("measured", "expected"), [
    (120.0, "accept"), (120.5, "accept"),             # inside the band
    (120.5 + 1.193, "accept"), (120.5 + 1.1931, "marginal"),
    (120.5 + 3 * 1.193, "marginal"), (120.5 + 3 * 1.193 + 1e-4, "outside"),
])
def test_boundaries_above_the_band_with_decimal_entries(measured, expected):
    # decimal entries (121.693 - 120.5 is not exactly 1.193 in binary) must not flip a boundary
    assert verdict(measured, 119.9, 120.5, 1.193) == expected


def test_zero_tolerance_leaves_only_the_band_and_no_marginal():
    assert verdict(1.0, 0.9, 1.0, 0.0) == "accept"
    assert verdict(1.0 + 1e-6, 0.9, 1.0, 0.0) == "outside"


def test_no_prediction_is_unchecked_and_negative_tolerance_refused():
    assert verdict(120.0, math.nan, math.nan, 1.0) == "unchecked"
    assert verdict(math.nan, 119.0, 121.0, 1.0) == "unchecked"
    with pytest.raises(ValueError, match="negative"):
        verdict(120.0, 119.0, 121.0, -1.0)


def test_angles_compare_on_the_nearest_turn():
    assert verdict(-179.5, 178.0, 180.0, 1.0, predicted=179.0, angle=True) == "accept"
    assert verdict(171.9, -12.4, -4.1, 3.0, predicted=-8.1, angle=True) == "outside"


def test_template_tolerances():
    assert template_tolerance("3 %", "p", -60.0) == pytest.approx(1.8)  # of |predicted|
    assert template_tolerance("0.05 Hz", "frequency", 60.0) == pytest.approx(0.05)
    assert template_tolerance("5 var", "q1", -80.0) == pytest.approx(5.0)
    assert template_tolerance("0.03", "pf", 0.99) == pytest.approx(0.03)
    assert template_tolerance("0.5", "thd_v", 4.4) == pytest.approx(0.5)  # percentage points
    assert template_tolerance("500 mV", "v_rms", 120.0) == pytest.approx(0.5)
    assert template_tolerance("instrument", "v_rms", 120.0) is None


def test_array_rule_agrees_with_the_scalar_rule():
    rng = np.random.default_rng(3)
    m = rng.normal(0, 3, 400)
    lo = rng.normal(-1, 0.5, 400)
    hi = lo + rng.uniform(0, 2, 400)
    tol = rng.uniform(0, 1, 400)
    m[:5] = np.nan
    expected = [verdict(*args) for args in zip(m, lo, hi, tol, strict=True)]
    assert list(verdicts(m, lo, hi, tol)) == expected
    assert {"accept", "marginal", "outside", "unchecked"} <= set(expected)
