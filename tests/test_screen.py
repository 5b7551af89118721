"""The safety screen on numbers: probabilities, joint figure, reasons, properties."""

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from scipy import stats

from guardband.safety.screen import (
    REASONS,
    LimitPrediction,
    joint_figure,
    limit_probability,
    run_screen,
    step_distance,
)


@pytest.mark.parametrize(
    "lower, upper",
    [(None, 1.0), (0.5, None), (-1.0, 2.0)],
    ids=["upper", "lower", "two-sided"],
)
def test_limit_probability_matches_scipy(lower, upper):
    # reference library: scipy.stats.norm
    rng = np.random.default_rng(0)
    mean = rng.normal(size=200)
    sd = rng.uniform(0.05, 2.0, size=200)
    expected = np.ones(200)
    if upper is not None:
        expected = stats.norm.cdf(upper, mean, sd)
    if lower is not None:
        expected = expected - stats.norm.cdf(lower, mean, sd)
    np.testing.assert_allclose(limit_probability(mean, sd, lower=lower, upper=upper), expected, rtol=1e-12, atol=1e-15)


def test_limit_probability_at_zero_sd():
    p = limit_probability([0.5, 1.5], [0.0, 0.0], upper=1.0)
    np.testing.assert_array_equal(p, [1.0, 0.0])


def test_95_band_tail():
    # trade practice: the chance of falling above mu + 1.96 sigma is 2.5%
    p = limit_probability(0.0, 1.0, upper=1.959963984540054)
    assert float(p) == pytest.approx(0.975, abs=1e-12)
    assert stats.norm.sf(1.959963984540054) == pytest.approx(0.025, abs=1e-12)


def test_joint_bound_and_product():
    P = np.array([[0.99, 0.98], [0.6, 0.5], [1.0, 1.0]])
    np.testing.assert_allclose(joint_figure(P), [0.97, 0.1, 1.0], atol=1e-15)
    np.testing.assert_allclose(joint_figure(P, method="independent"), [0.9702, 0.3, 1.0], atol=1e-15)
    # the bound never exceeds the product (Boole's inequality versus independence)
    assert np.all(joint_figure(P) <= joint_figure(P, method="independent") + 1e-15)


# The default joint figure is the Frechet lower bound P(all met) >= 1 - sum(1 - p_i)
# (Boole's inequality on the events "limit i broken"; Frechet 1935, Fundamenta
# Mathematicae 25, 379-387, from memory). The checks below build joint laws of
# the limits with numpy and compare the figure with their true P(all met).
probabilities = st.lists(st.floats(0, 1), min_size=1, max_size=6)


def _worst_case_law(p):
    """P(all met) and the marginals when the events "limit i broken" are most disjoint.

    U ~ Uniform[0, 1); limit i is broken when U falls in an arc of length
    1 - p_i on the unit circle, the arcs laid end to end. While the lengths
    add up to at most 1 the arcs are pairwise disjoint, so P(all met) is
    1 - sum(1 - p_i) exactly; beyond that they cover the circle and it is 0.
    Enumerated over the pieces between the arcs' ends, so the result is exact
    up to rounding.
    """
    q = 1.0 - np.asarray(p, dtype=float)
    start = np.concatenate([[0.0], np.cumsum(q)[:-1]])
    cuts = np.unique(np.concatenate([[0.0, 1.0], np.mod(start, 1.0), np.mod(start + q, 1.0)]))
    length = np.diff(cuts)
    mid = cuts[:-1] + length / 2
    broken = np.mod(mid[:, None] - start[None, :], 1.0) < q[None, :]  # (pieces, limits)
    return float(length[~broken.any(axis=1)].sum()), length @ ~broken


def _independent_law(p):
    """P(all met) and the marginals of independent limits, over all 2**n outcomes."""
    p = np.asarray(p, dtype=float)
    met = np.array(np.meshgrid(*[[False, True]] * p.size, indexing="ij")).reshape(p.size, -1).T
    weight = np.prod(np.where(met, p, 1.0 - p), axis=1)
    return float(weight[met.all(axis=1)].sum()), weight @ met


@given(probabilities)
def test_bound_is_reached_when_the_limits_break_on_disjoint_events(ps):
    all_met, marginals = _worst_case_law(ps)
    np.testing.assert_allclose(marginals, ps, atol=1e-12)  # the law has the given p_i
    np.testing.assert_allclose(all_met, max(0.0, 1.0 - sum(1.0 - p for p in ps)), atol=1e-12)
    # the default figure is this law's true P(all met): no smaller figure is valid for every law
    np.testing.assert_allclose(joint_figure(np.array([ps]))[0], all_met, atol=1e-12)


@given(probabilities)
def test_bound_is_below_the_truth_for_independent_limits(ps):
    all_met, marginals = _independent_law(ps)
    np.testing.assert_allclose(marginals, ps, atol=1e-12)
    np.testing.assert_allclose(all_met, np.prod(ps), rtol=1e-12, atol=1e-300)
    figure = joint_figure(np.array([ps]))[0]
    assert figure <= all_met + 1e-12
    if len(ps) == 2 and ps[0] + ps[1] >= 1.0:
        # two limits: (1 - q1)(1 - q2) - (1 - q1 - q2) = q1 q2 exactly
        q1, q2 = 1.0 - ps[0], 1.0 - ps[1]
        np.testing.assert_allclose(all_met - figure, q1 * q2, atol=1e-12)


def test_bound_is_strictly_below_the_truth_for_independent_limits():
    # 1 - 0.1 - 0.05 - 0.01 = 0.84 < 0.9 * 0.95 * 0.99 = 0.84645
    all_met, _ = _independent_law([0.9, 0.95, 0.99])
    assert joint_figure(np.array([[0.9, 0.95, 0.99]]))[0] == pytest.approx(0.84, abs=1e-12)
    assert all_met == pytest.approx(0.84645, abs=1e-12)


@settings(max_examples=200)
@given(st.integers(1, 5), st.integers(0, 2**32 - 1))
def test_bound_holds_for_any_joint_law(n, seed):
    # a random law over the 2**n outcomes (met / broken for each limit)
    rng = np.random.default_rng(seed)
    met = np.array(np.meshgrid(*[[False, True]] * n, indexing="ij")).reshape(n, -1).T
    weight = rng.dirichlet(np.full(met.shape[0], 0.3))
    figure = joint_figure((weight @ met)[None, :])[0]
    assert figure <= weight[met.all(axis=1)].sum() + 1e-12


def _lim(name, mean, sd, upper=1.0, probability=0.9, status="ok", message=""):
    return LimitPrediction(name, probability, None, upper, status=status,
                           mean=None if mean is None else np.asarray(mean, float),
                           sd=None if sd is None else np.asarray(sd, float), message=message)


def test_reasons_in_order_and_counts_add_up():
    n = 7
    inside = np.array([False, True, True, True, True, True, True])
    forbidden = np.array([False, True, False, False, False, False, False])
    step = np.array([0.1, 0.1, 0.9, 0.1, 0.1, 0.1, 0.1])
    mean = np.array([0, 0, 0, 2.0, 0.75, 0.0, 0.0])
    sd = np.full(n, 0.2)
    lim2_mean = np.array([0, 0, 0, 0, 0, 0.8, 0.0])
    res = run_screen(
        inside=inside, forbidden=forbidden, step=step, max_step=0.5,
        limits=[_lim("a", mean, sd), _lim("b", lim2_mean, sd)],
        threshold=0.95,
    )
    assert list(res.reason) == [
        "outside-design-space", "forbidden-region", "step-too-large",
        "limit-probability", "limit-probability", "limit-probability", "",
    ]
    # candidate 4: p_a = Phi(1.25) = 0.894 < 0.9
    assert "limit 'a': probability 0.8944 is below the required 0.9" in res.detail[4]
    counts = res.counts()
    assert sum(counts.values()) == n
    assert counts["survived"] == 1


def test_joint_threshold_reason():
    # each limit passes its own 0.9 but the bound 1 - 0.05 - 0.05 = 0.90 < 0.95
    z = stats.norm.ppf(0.95)
    res = run_screen(
        inside=np.ones(1, bool),
        limits=[_lim("a", [1.0 - z * 0.1], [0.1]), _lim("b", [1.0 - z * 0.1], [0.1])],
        threshold=0.95,
    )
    assert res.reason[0] == "joint-below-threshold"
    assert res.joint[0] == pytest.approx(0.90, abs=1e-9)


def test_fail_closed_limit_excludes_everything():
    res = run_screen(
        inside=np.ones(5, bool),
        limits=[_lim("a", np.zeros(5), np.full(5, 0.01)),
                _lim("b", None, None, status="too-few-runs", message="2 measured run(s), the protocol requires at least 6")],
        threshold=0.5,
    )
    assert not res.survives.any()
    assert set(res.reason) == {"too-few-runs"}
    assert "limit 'b': 2 measured run(s), the protocol requires at least 6" in res.detail[0]
    assert res.messages and "cannot vouch" in res.messages[0]
    np.testing.assert_array_equal(res.joint, np.zeros(5))


@settings(max_examples=60, deadline=None)
@given(
    st.integers(1, 40),
    st.integers(0, 2**31 - 1),
    st.floats(0.05, 0.95),
    st.floats(0.0, 0.5),
)
def test_raising_threshold_never_admits(n, seed, t1, dt):
    rng = np.random.default_rng(seed)
    lims = [_lim(f"l{j}", rng.normal(0.5, 0.5, n), rng.uniform(0.01, 1, n), probability=0.5) for j in range(3)]
    kw = dict(inside=rng.random(n) > 0.1, step=rng.random(n), max_step=0.8, limits=lims)
    low = run_screen(threshold=t1, **kw)
    high = run_screen(threshold=min(t1 + dt, 0.999), **kw)
    assert not np.any(high.survives & ~low.survives)
    # every candidate is either a survivor or excluded with a known reason
    for res in (low, high):
        assert np.all((res.reason == "") == res.survives)
        assert set(res.reason) <= set(REASONS) | {""}
        assert sum(res.counts().values()) == n


def test_step_distance_against_brute_force():
    rng = np.random.default_rng(3)
    U = rng.random((50, 4))
    S = rng.random((7, 4))
    brute = np.min(np.linalg.norm(U[:, None, :] - S[None, :, :], axis=2), axis=1) / 2.0
    np.testing.assert_allclose(step_distance(U, S), brute, rtol=1e-10, atol=1e-12)
    assert np.all(np.isinf(step_distance(U, S[:0])))
