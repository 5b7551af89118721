"""Binned calibration of promised joint figures, and the exact binomial interval of each bin."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import binomtest

from guardband.safety.calibration import binned_calibration, clopper_pearson


@pytest.mark.parametrize(("k", "n"), [(0, 1), (0, 7), (3, 7), (7, 7), (19, 20), (48, 50), (1, 400), (250, 500)])
@pytest.mark.parametrize("confidence", [0.9, 0.95])
def test_clopper_pearson_equals_scipys_exact_interval(k, n, confidence):
    # reference library: scipy.stats.binomtest(k, n).proportion_ci(method="exact") (Clopper & Pearson 1934)
    ref = binomtest(k, n).proportion_ci(confidence_level=confidence, method="exact")
    lo, hi = clopper_pearson(k, n, confidence)
    assert lo == pytest.approx(ref.low, abs=1e-12)
    assert hi == pytest.approx(ref.high, abs=1e-12)


def test_clopper_pearson_closed_form_ends_and_refusals():
    # Clopper & Pearson (1934): with k = 0 the upper end solves (1 - p)^n = alpha/2
    lo, hi = clopper_pearson(0, 10)
    assert lo == 0.0 and hi == pytest.approx(1 - 0.025 ** (1 / 10), rel=1e-12)
    lo, hi = clopper_pearson(10, 10)
    assert hi == 1.0 and lo == pytest.approx(0.025 ** (1 / 10), rel=1e-12)
    assert all(math.isnan(v) for v in clopper_pearson(0, 0))
    with pytest.raises(ValueError, match="0 <= k <= n"):
        clopper_pearson(5, 4)


def test_bins_against_a_hand_count():
    # threshold 0.85: bins [0.85, 0.9), [0.9, 0.95), [0.95, 0.99), [0.99, 1]
    promised = [0.86, 0.89, 0.90, 0.93, 0.949999, 0.95, 0.97, 0.99, 1.0, 0.995, float("nan")]
    met = [True, False, True, True, False, True, True, True, True, False, False]
    bins = binned_calibration(promised, met, 0.85)
    # by hand: [0.85,0.9): 0.86 met, 0.89 not -> 1 of 2; [0.9,0.95): 0.90, 0.93 met, 0.949999 not -> 2 of 3;
    # [0.95,0.99): 0.95, 0.97 met -> 2 of 2; [0.99,1]: 0.99, 1.0 met, 0.995 not -> 2 of 3; NaN left out
    assert [(b["low"], b["high"]) for b in bins] == [(0.85, 0.9), (0.9, 0.95), (0.95, 0.99), (0.99, 1.0)]
    assert [(b["met"], b["runs"]) for b in bins] == [(1, 2), (2, 3), (2, 2), (2, 3)]
    assert bins[0]["mean_promised"] == pytest.approx((0.86 + 0.89) / 2)
    assert bins[3]["mean_promised"] == pytest.approx((0.99 + 1.0 + 0.995) / 3)
    assert bins[1]["met_share"] == pytest.approx(2 / 3)
    ref = binomtest(2, 3).proportion_ci(method="exact")
    assert (bins[1]["ci_low"], bins[1]["ci_high"]) == pytest.approx((ref.low, ref.high), abs=1e-12)


def test_a_threshold_above_an_edge_drops_it_and_a_promise_below_gets_its_own_bin():
    bins = binned_calibration([0.5, 0.96, 0.97, 0.999], [False, True, True, True], 0.95)
    assert [(b["low"], b["high"], b["runs"], b["met"]) for b in bins] == [
        (0.0, 0.95, 1, 0), (0.95, 0.99, 2, 2), (0.99, 1.0, 1, 1)]
    empty = binned_calibration(np.zeros(0), np.zeros(0, bool), 0.9)
    assert [b["runs"] for b in empty] == [0, 0, 0] and math.isnan(empty[0]["met_share"])
    with pytest.raises(ValueError, match="differ in length"):
        binned_calibration([0.9], [True, False], 0.9)
