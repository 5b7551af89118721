"""Ranking rules: checked against scipy.integrate.quad and scipy.stats, with
property tests over many cases (hypothesis)."""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, stats

from guardband.planner.step.acquisition import (
    RULES,
    all_values,
    confidence_bound,
    expected_improvement,
    log_expected_improvement,
    log_probability_of_improvement,
    posterior_mean,
    probability_of_improvement,
    score,
)
from guardband.planner.inputs.protocol import RANKING_RULES

MUS = [-3.0, 0.0, 120.0]
SIGMAS = [1e-12, 0.01, 1.0, 30.0]
ZS = [-40.0, -8.0, -3.0, -1.0, -0.2, 0.0, 0.7, 2.0, 6.0, 40.0]


def _ei_by_quad(z: float) -> float:
    """E[max(z - T, 0)] for T ~ N(0, 1), by scipy.integrate.quad (reference library)."""

    def integrand(t):
        return (z - t) * stats.norm.pdf(t)

    if z > 0:  # split at the peak of the density so quad sees it
        return (
            integrate.quad(integrand, -np.inf, 0.0, epsabs=0, epsrel=1e-12)[0]
            + integrate.quad(integrand, 0.0, z, epsabs=0, epsrel=1e-12)[0]
        )
    return integrate.quad(integrand, -np.inf, z, epsabs=0, epsrel=1e-12)[0]


# ---------------------------------------------------------------------------
# Expected improvement, Jones, Schonlau & Welch (1998) (formula from memory)


@pytest.mark.parametrize("mu", MUS, ids=[f"mu={m:g}" for m in MUS])
@pytest.mark.parametrize("sigma", SIGMAS, ids=[f"sigma={s:g}" for s in SIGMAS])
def test_ei_equals_integral_of_improvement(mu, sigma):
    # EI = integral of max(y* - y, 0) under N(mu, sigma^2) = sigma * E[max(z - T, 0)]
    incumbents = np.array([mu + z * sigma for z in ZS])
    ei = expected_improvement(np.full(len(ZS), mu), np.full(len(ZS), sigma), incumbents)
    # the reference uses the z that the floats actually represent
    ref = np.array([sigma * _ei_by_quad((inc - mu) / sigma) for inc in incumbents])
    assert np.all(np.isfinite(ei)) and np.all(ei >= 0)
    # quad runs at epsrel 1e-12; atol only for values that underflow double precision (z = -40)
    np.testing.assert_allclose(ei, ref, rtol=1e-9, atol=1e-300)
    assert np.all(np.diff(ei) >= 0)  # incumbents ascend: EI does not decrease


def test_ei_with_zero_sd_is_the_plain_improvement():
    mean = np.array([1.0, 2.0, 3.0])
    np.testing.assert_array_equal(expected_improvement(mean, np.zeros(3), 2.0), [1.0, 0.0, 0.0])
    np.testing.assert_array_equal(expected_improvement(mean, np.zeros(3), 2.0, maximize=True), [0.0, 0.0, 1.0])
    # and sigma -> 0 approaches it
    np.testing.assert_allclose(expected_improvement(mean, np.full(3, 1e-12), 2.0), [1.0, 0.0, 0.0], rtol=1e-12, atol=1e-12)
    # a denormal sigma (z overflows to inf) still gives the plain improvement
    np.testing.assert_allclose(expected_improvement(0.0, 1e-310, 5.0), 5.0, rtol=1e-15)
    np.testing.assert_allclose(log_expected_improvement(0.0, 1e-310, 5.0), math.log(5.0), rtol=1e-15)


def _log_ei_by_quad(z: float) -> float:
    """log E[max(z - T, 0)], T ~ N(0, 1), for z < 0 without underflow.

    With t = z - s: E[max(z - T, 0)] = phi(z) * int_0^inf s exp(z s - s^2 / 2) ds,
    and the remaining integral (about 1/z^2) is well scaled for quad.
    """
    upper = 80.0 / (abs(z) + 1.0)  # the integrand is below exp(-80) of its peak beyond
    j = integrate.quad(lambda s: s * math.exp(z * s - 0.5 * s * s), 0.0, upper, epsabs=0, epsrel=1e-13, limit=200)[0]
    return stats.norm.logpdf(z) + math.log(j)


TAIL_ZS = [-1.5, -5.0, -20.0, -39.0, -40.0, -40.5, -41.0, -100.0, -1e3, -1e5]


@pytest.mark.parametrize("z", TAIL_ZS, ids=[f"z={z:g}" for z in TAIL_ZS])
@pytest.mark.parametrize("sigma", [1e-3, 1.0, 50.0], ids=["sigma=1e-3", "sigma=1", "sigma=50"])
def test_log_ei_far_tail_matches_rescaled_integral(z, sigma):
    got = log_expected_improvement(0.0, sigma, z * sigma)
    ref = math.log(sigma) + _log_ei_by_quad((z * sigma) / sigma)
    # absolute error 1e-11 in the log is relative error 1e-11 in EI itself (quad runs at
    # epsrel 1e-13); the second term is a few float spacings of the log (-5e9 at z = -1e5)
    assert abs(got - ref) < 1e-11 + 4e-16 * abs(ref)


def test_log_ei_agrees_with_log_of_ei_where_representable():
    z = np.linspace(-30.0, 30.0, 601)
    for sigma in (1e-6, 1.0, 1e4):
        mu = 5.0
        inc = mu + z * sigma
        np.testing.assert_allclose(
            log_expected_improvement(mu, sigma, inc), np.log(expected_improvement(mu, sigma, inc)), rtol=0, atol=1e-12
        )
    # and with the textbook formula via scipy.stats.norm where it has no cancellation (z >= -10)
    z = np.linspace(-10.0, 30.0, 401)
    direct = z * stats.norm.cdf(z) + stats.norm.pdf(z)
    np.testing.assert_allclose(log_expected_improvement(0.0, 1.0, z), np.log(direct), rtol=0, atol=1e-9)


def test_log_ei_finite_and_increasing_deep_in_the_tail():
    z = np.sort(-np.logspace(0, 8, 2000))
    values = log_expected_improvement(0.0, 1.0, z)
    assert np.all(np.isfinite(values))
    assert np.all(np.diff(values) > 0)
    # -inf exactly where EI is exactly zero
    np.testing.assert_array_equal(log_expected_improvement([1.0, 3.0], [0.0, 0.0], 2.0), [0.0, -np.inf])


def test_ei_continuous_across_the_internal_switch_points():
    for z0 in (-1.0, -40.0):
        z = z0 + np.array([-1e-9, 0.0, 1e-9])
        values = log_expected_improvement(0.0, 1.0, z)
        # d log EI / dz is about |z| here: steps of 1e-9 move it by about 1e-9 |z|
        assert np.all(np.diff(values) > 0)
        assert np.all(np.abs(np.diff(values)) < 3e-9 * abs(z0) + 1e-12)


# ---------------------------------------------------------------------------
# Properties over many cases

finite = st.floats(-1e3, 1e3, allow_nan=False, allow_infinity=False)
sds = st.one_of(st.just(0.0), st.floats(1e-12, 1e3))


@settings(deadline=None, max_examples=300)
@given(mu=finite, sigma=sds, inc=finite)
def test_ei_is_finite_non_negative_and_at_least_the_plain_improvement(mu, sigma, inc):
    ei = float(expected_improvement(mu, sigma, inc))
    u = inc - mu
    assert math.isfinite(ei) and ei >= 0.0
    # EI >= max(u, 0) (Jensen); rounding allowance of a few ulps of |u| + sigma
    assert ei >= max(u, 0.0) - 1e-12 * (abs(u) + sigma)
    pi = float(probability_of_improvement(mu, sigma, inc))
    assert 0.0 <= pi <= 1.0


@settings(deadline=None, max_examples=300)
@given(mu=finite, sigma=sds, a=finite, b=finite)
def test_ei_and_pi_do_not_decrease_with_the_incumbent_when_minimising(mu, sigma, a, b):
    lo, hi = min(a, b), max(a, b)
    ei = expected_improvement([mu, mu], [sigma, sigma], np.array([lo, hi]))
    # rounding allowance: 1e-12 relative
    assert ei[0] <= ei[1] * (1 + 1e-12) + 1e-300
    pi = probability_of_improvement([mu, mu], [sigma, sigma], np.array([lo, hi]))
    assert pi[0] <= pi[1] + 1e-15


@settings(deadline=None, max_examples=300)
@given(mu=finite, sigma=sds, inc=finite, xi=st.floats(0.0, 10.0), kappa=st.floats(0.0, 5.0))
def test_maximising_mirrors_minimising(mu, sigma, inc, xi, kappa):
    # maximising mu over incumbent y* is minimising -mu over -y*; the improvement is the same float
    assert expected_improvement(mu, sigma, inc, maximize=True) == expected_improvement(-mu, sigma, -inc)
    assert log_expected_improvement(mu, sigma, inc, maximize=True) == log_expected_improvement(-mu, sigma, -inc)
    assert probability_of_improvement(mu, sigma, inc, xi=xi, maximize=True) == probability_of_improvement(
        -mu, sigma, -inc, xi=xi
    )
    assert confidence_bound(mu, sigma, kappa=kappa, maximize=True) == -confidence_bound(-mu, sigma, kappa=kappa)
    for rule in RULES:
        assert score(rule, mu, sigma, inc, maximize=True, kappa=kappa, xi=xi) == score(
            rule, -mu, sigma, -inc, maximize=False, kappa=kappa, xi=xi
        )


# ---------------------------------------------------------------------------
# Probability of improvement, Kushner (1964) (formula from memory)


def test_pi_matches_normal_cdf():
    mu = np.array([0.0, 1.0, -2.0, 10.0, 3.0])
    sd = np.array([1.0, 0.5, 2.0, 1e-3, 4.0])
    inc, xi = 1.5, 0.25
    # reference library: P(Y < y* - xi) for Y ~ N(mu, sd^2)
    ref = stats.norm.cdf(inc - xi, loc=mu, scale=sd)
    np.testing.assert_allclose(probability_of_improvement(mu, sd, inc, xi=xi), ref, rtol=1e-12, atol=1e-300)
    np.testing.assert_allclose(
        log_probability_of_improvement(mu, sd, inc, xi=xi), stats.norm.logcdf(inc - xi, loc=mu, scale=sd), rtol=1e-12
    )
    ref_max = stats.norm.sf(inc + xi, loc=mu, scale=sd)  # P(Y > y* + xi)
    np.testing.assert_allclose(probability_of_improvement(mu, sd, inc, xi=xi, maximize=True), ref_max, rtol=1e-12)


def test_pi_with_zero_sd():
    got = probability_of_improvement([0.0, 1.0, 2.0], [0.0, 0.0, 0.0], 1.0, xi=0.0)
    np.testing.assert_array_equal(got, [1.0, 0.0, 0.0])  # strict improvement only
    got = probability_of_improvement([0.0, 0.8], [0.0, 0.0], 1.0, xi=0.5)
    np.testing.assert_array_equal(got, [1.0, 0.0])


# ---------------------------------------------------------------------------
# Confidence bound, Srinivas et al. (2010) (from memory); 95% band (trade practice)


def test_two_and_a_half_percent_below_a_95_percent_band():
    mu, sigma = 0.8, 0.05
    lower = float(confidence_bound(mu, sigma, kappa=1.96))
    np.testing.assert_allclose(lower, mu - 1.96 * sigma, rtol=1e-15)
    # trade practice: a two-sided 95% band leaves 2.5% below its lower end (scipy.stats.norm)
    below = stats.norm.cdf(lower, loc=mu, scale=sigma)
    assert abs(below - 0.025) < 1e-4
    # the same figure through the probability of improvement with the bound as incumbent
    np.testing.assert_allclose(probability_of_improvement(mu, sigma, lower), below, rtol=1e-12)
    upper = float(confidence_bound(mu, sigma, kappa=1.96, maximize=True))
    np.testing.assert_allclose(upper, mu + 1.96 * sigma, rtol=1e-15)
    assert abs(stats.norm.sf(upper, loc=mu, scale=sigma) - 0.025) < 1e-4


# ---------------------------------------------------------------------------
# Registry


def test_registry_covers_the_protocol_rules():
    assert set(RULES) == set(RANKING_RULES)
    assert all(RULES[name].name == name for name in RULES)
    with pytest.raises(TypeError):
        RULES["new"] = RULES["ei"]  # read-only


@pytest.mark.parametrize("maximize", [False, True], ids=["minimise", "maximise"])
@pytest.mark.parametrize("rule", list(RULES), ids=list(RULES))
def test_score_orders_like_the_value_in_the_improving_direction(rule, maximize):
    rng = np.random.default_rng(3)
    mean = rng.normal(0.0, 1.0, 40)
    sd = rng.uniform(0.2, 1.5, 40)
    inc = 0.0
    value = RULES[rule].value(mean, sd, inc, maximize=maximize, kappa=1.5, xi=0.1)
    goodness = value if rule in ("ei", "pi") or maximize else -value
    s = score(rule, mean, sd, inc, maximize=maximize, kappa=1.5, xi=0.1)
    np.testing.assert_array_equal(np.argsort(s), np.argsort(goodness))


def test_log_scores_still_rank_where_ei_underflows():
    mean = np.array([50.0, 60.0])  # z = -50 and -60 when minimising from 0 with sd 1
    assert np.all(expected_improvement(mean, 1.0, 0.0) == 0.0)
    s = score("ei", mean, [1.0, 1.0], 0.0)
    assert np.all(np.isfinite(s)) and s[0] > s[1]
    s = score("pi", mean, [1.0, 1.0], 0.0)
    assert np.all(np.isfinite(s)) and s[0] > s[1]


def test_all_values_are_the_natural_units():
    mean, sd, inc = np.array([1.0, 2.0]), np.array([0.5, 0.1]), 1.5
    values = all_values(mean, sd, inc, maximize=False, kappa=1.96, xi=0.0)
    assert list(values) == ["ei", "pi", "bound", "mean"]
    np.testing.assert_array_equal(values["ei"], expected_improvement(mean, sd, inc))
    np.testing.assert_array_equal(values["pi"], probability_of_improvement(mean, sd, inc))
    np.testing.assert_allclose(values["bound"], mean - 1.96 * sd, rtol=1e-15)
    np.testing.assert_array_equal(values["mean"], posterior_mean(mean))
    no_incumbent = all_values(mean, sd, None)
    assert np.all(np.isnan(no_incumbent["ei"])) and np.all(np.isnan(no_incumbent["pi"]))
    assert np.all(np.isfinite(no_incumbent["bound"]))


def test_misuse_is_refused_with_a_message():
    with pytest.raises(ValueError, match=re.escape("unknown ranking rule 'ucb'; known rules: ei, pi, bound, mean")):
        score("ucb", [0.0], [1.0], 0.0)
    with pytest.raises(ValueError, match=re.escape("rule 'ei' needs an incumbent")):
        score("ei", [0.0], [1.0])
    with pytest.raises(ValueError, match=re.escape("sd must be finite and >= 0")):
        expected_improvement([0.0], [-1.0], 0.0)
    with pytest.raises(ValueError, match=re.escape("mean contains NaN or infinite values")):
        probability_of_improvement([np.nan], [1.0], 0.0)
    with pytest.raises(ValueError, match=re.escape("kappa must be >= 0; got -1.0")):
        confidence_bound([0.0], [1.0], kappa=-1.0)
    with pytest.raises(ValueError, match=re.escape("do not broadcast")):
        expected_improvement([0.0, 1.0, 2.0], [1.0, 1.0], 0.0)


def test_inputs_are_not_mutated():
    mean, sd = np.array([1.0, -2.0]), np.array([0.0, 3.0])
    before = mean.copy(), sd.copy()
    for rule in RULES:
        score(rule, mean, sd, 0.5, maximize=True)
    all_values(mean, sd, 0.5)
    np.testing.assert_array_equal(mean, before[0])
    np.testing.assert_array_equal(sd, before[1])
