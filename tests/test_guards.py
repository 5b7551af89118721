"""The limit-model guards: no claim rests on a single run; local one-sided widening.

Reference values are derived, not looked up: the deletion formulas are
checked against a refit without the run (same hyperparameters), the
one-sided error scaling against the half-normal second moment
(E[max(U, 0)^2] = 1/2 for a standard normal U), and the sd widening
against the probability it must reach.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from guardband.planner.models import Hyperparameters, fit_gp
from guardband.planner.models.guards import (
    WIDEN_CAP,
    GuardedLimitModel,
    _widen_to,
    deletion_predictions,
    optimistic_errors,
)
from guardband.planner.step.batch import _pessimistic_value
from guardband.safety.limits import LimitRule
from guardband.safety.screen import limit_probability

HP = Hyperparameters(np.array([0.3, 0.4]), 1.0, 1e-3)


def _data(n=12, seed=0):
    rng = np.random.default_rng(seed)
    X = rng.random((n, 2))
    y = np.sin(3 * X[:, 0]) + 0.5 * X[:, 1]
    return X, y


def test_deleting_a_run_matches_a_refit_without_it():
    X, y = _data()
    gp = fit_gp(X, y, prior_mean=0.5, hyperparameters=HP)
    Xs = np.random.default_rng(1).random((7, 2))
    means, sds = deletion_predictions(gp, Xs)
    noise = gp.scale**2 * (HP.noise_variance + gp.jitter)
    for i in range(X.shape[0]):
        keep = np.arange(X.shape[0]) != i
        # the textbook prediction without run i (Rasmussen & Williams 2006, Alg. 2.1), same kernel
        K = gp.kernel(X[keep]) + noise * np.eye(keep.sum())
        ks = gp.kernel(Xs, X[keep])
        m = 0.5 + ks @ np.linalg.solve(K, y[keep] - 0.5)
        v = np.diag(gp.kernel(Xs)) - np.einsum("ij,ji->i", ks, np.linalg.solve(K, ks.T))
        np.testing.assert_allclose(means[:, i], m, rtol=1e-6, atol=1e-8)
        np.testing.assert_allclose(sds[:, i], np.sqrt(v), rtol=1e-5, atol=1e-8)


def test_optimistic_errors_have_mean_one_under_a_calibrated_model():
    u = np.random.default_rng(2).standard_normal(400_000)
    # 2 E[max(U,0)^2] = 1 (half-normal second moment)
    assert optimistic_errors(u, None, 1.0).mean() == pytest.approx(1.0, abs=0.01)
    assert optimistic_errors(u, 0.0, None).mean() == pytest.approx(1.0, abs=0.01)
    assert optimistic_errors(u, 0.0, 1.0).mean() == pytest.approx(1.0, abs=0.01)
    # only the hopeful side counts: for an upper limit, runs that came out higher
    assert optimistic_errors(np.array([-3.0, 2.0]), None, 1.0).tolist() == [0.0, 8.0]


@pytest.mark.parametrize("lower,upper", [(None, 0.2), (-0.5, None), (-0.8, 0.6)], ids=["upper", "lower", "two-sided"])
def test_widening_reaches_the_target_probability_and_never_narrows(lower, upper):
    rng = np.random.default_rng(3)
    mean = rng.uniform(-0.3, 0.1, 50)
    sd = rng.uniform(0.01, 0.3, 50)
    p = limit_probability(mean, sd, lower=lower, upper=upper)
    target = p * rng.uniform(0.2, 1.0, 50)  # some targets below 1/2
    m_out, out = _widen_to(mean, sd, target, lower, upper)
    assert np.all(out >= sd)
    p_new = limit_probability(m_out, out, lower=lower, upper=upper)
    inside = np.ones(50, bool)
    if upper is not None:
        inside &= mean < upper
    if lower is not None:
        inside &= mean > lower
    if lower is None or upper is None:  # one-sided: every target is met, the sd at most WIDEN_CAP times
        np.testing.assert_allclose(p_new[inside], np.minimum(target, p)[inside], atol=1e-9)
        assert np.all(out <= WIDEN_CAP * sd * (1 + 1e-12))
        moved = m_out != mean
        assert np.all(np.isclose(out[moved], WIDEN_CAP * sd[moved]))  # the mean moves only at the cap
        towards = (m_out - mean) * (1.0 if upper is not None else -1.0)
        assert np.all(towards >= 0)  # and only towards the limit
        assert np.any(moved) and np.any(p_new[moved] < 0.5)  # both cases occur here
    else:  # two-sided: bisection, the mean kept, every target reachable below the cap of 1e6
        assert np.all(m_out == mean)
        reachable = inside & (target > limit_probability(mean, sd * 1e6, lower=lower, upper=upper))
        np.testing.assert_allclose(p_new[reachable], np.minimum(target, p)[reachable], atol=1e-6)


def test_the_widened_mean_is_continuous_in_the_target():
    # one-sided: as the target falls, the sd grows to the cap, then the mean slides to the limit and
    # past it, with no jump anywhere (a plotted band neither shoots off nor jumps)
    target = np.linspace(0.99, 0.05, 2001)
    mean, sd = np.full(target.size, 0.0), np.full(target.size, 0.1)
    m_out, s_out = _widen_to(mean, sd, target, None, 0.5, p=np.ones(target.size))
    assert np.max(np.abs(np.diff(m_out))) < 0.01 and np.max(np.abs(np.diff(s_out))) < 0.01
    assert s_out.max() == pytest.approx(WIDEN_CAP * 0.1) and m_out[-1] > 0.5 > m_out[0]


def _one_safe_run():
    """Nine runs far above an upper limit of 0.5 and one run well below it."""
    rng = np.random.default_rng(4)
    X = np.vstack([[0.5, 0.5], rng.random((9, 2)) * 0.3 + np.array([[0.0, 0.0]])])
    X[1:, 0] += np.where(np.arange(9) % 2 == 0, 0.0, 0.7)
    y = np.r_[0.0, np.ones(9)]
    gp = fit_gp(X, y, prior_mean=0.5, hyperparameters=Hyperparameters(np.array([0.6, 0.6]), 1.0, 1e-4))
    return X, y, gp


def test_a_claim_that_rests_on_one_run_is_not_trusted_away_from_it():
    X, _, gp = _one_safe_run()
    guarded = GuardedLimitModel(gp, lower=None, upper=0.5, deletion=True, local=False)
    near = X[0] + np.array([[0.0, 0.0]])
    farther = X[0] + np.array([[0.0, 0.15]])
    p = lambda m, pts: limit_probability(*m.predict(pts), upper=0.5)[0]
    # at the run itself the run measured the answer: no penalty
    assert p(guarded, near) == pytest.approx(p(gp, near), abs=1e-9)
    # a short way off, the unguarded model vouches at 0.95 on the strength of
    # that one run; without it the claim collapses, and the guard says so
    assert p(gp, farther) > 0.95
    assert p(guarded, farther) < 0.95 <= p(gp, farther)


def test_the_guarded_figure_is_the_guards_own_even_below_one_half():
    """Where the guard's figure falls below 1/2 while the full model's mean is inside a one-sided
    limit, no widening of the sd can give it (the figure tends to 1/2 as the sd grows). It used
    to come out as the widening's cap, the sd times a million and a figure of just over 1/2: a
    plot's band shot off the page, and a screen at a threshold of 1/2 passed such a point. The
    figure must be the guard's own, by the blend of the docstring, computed here by hand."""
    X, _, gp = _one_safe_run()
    guarded = GuardedLimitModel(gp, lower=None, upper=0.5, deletion=True, local=False)
    pts = X[0] + np.column_stack([np.linspace(0.0, 0.5, 60), np.zeros(60)])
    mean, sd = gp.predict(pts)
    p_full = stats.norm.cdf((0.5 - mean) / sd)
    m_del, sd_del = deletion_predictions(gp, pts)
    near = np.clip(gp.kernel(pts, X) / (gp.scale**2 * gp.hyperparameters.signal_variance), 0, 1) ** 2
    blend = near * p_full[:, None] + (1 - near) * stats.norm.cdf((0.5 - m_del) / sd_del)
    p_guard = np.minimum(p_full, blend.min(axis=1))
    below = (p_guard < 0.45) & (mean < 0.5)
    assert below.sum() >= 5  # the case in question occurs on this line
    g_mean, g_sd = guarded.predict(pts)
    np.testing.assert_allclose(limit_probability(g_mean, g_sd, upper=0.5), p_guard, atol=1e-6)
    assert np.all(np.isfinite(g_sd)) and np.all(g_sd <= 1e3 * sd)  # no sd at the widening's cap
    # the same for a lower limit, mirrored
    mirrored = GuardedLimitModel(fit_gp(X, -gp.y, prior_mean=-0.5, hyperparameters=gp.hyperparameters),
                                 lower=-0.5, upper=None, deletion=True, local=False)
    np.testing.assert_allclose(limit_probability(*mirrored.predict(pts), lower=-0.5), p_guard, atol=1e-6)


def test_the_screen_names_the_run_a_claim_rests_on():
    """A candidate that passes with every run counted but not with one run left
    out is excluded with its own reason, naming that run; one that fails either
    way keeps the ordinary reason."""
    from guardband.safety.limits import ScreenRules
    from guardband.safety.screen import hard_rules, limit_predictions, screen_points

    class Space:
        def contains(self, X):
            return np.ones(len(X), dtype=bool)

        def describe_violation(self, x):
            return ""

    X, _, gp = _one_safe_run()
    labels = [f"R{i:02d}" for i in range(len(X))]
    guarded = GuardedLimitModel(gp, lower=None, upper=0.5, deletion=True, local=False, labels=labels)
    rule = LimitRule("impurity", None, 0.5, 0.95, "true-value")
    rules = ScreenRules((rule,), (), 0.95, "bound", None, None, 0.05)
    U = np.vstack([X[0], X[0] + [0.0, 0.15], X[1]])
    hard = hard_rules(rules, Space(), U, U, X[:1], step_basis="run that met every limit")
    res = screen_points(rules, hard, limit_predictions(rules.limits, [guarded], U))
    p_all = limit_probability(*gp.predict(U), upper=0.5)
    assert p_all[1] > 0.95 and res.P[1, 0] < 0.95  # the guard alone decides at the second point
    assert res.survives.tolist() == [True, False, False]
    assert res.reason[1] == "rests-on-one-run"
    assert "without run R00" in res.detail[1] and f"{p_all[1]:.3f} with every run" in res.detail[1]
    assert res.reason[2] == "limit-probability"  # above the limit whatever is left out
    unguarded = screen_points(rules, hard, limit_predictions(rules.limits, [gp], U))
    assert unguarded.survives[1] and "rests-on-one-run" not in set(unguarded.reason)


def test_guards_never_raise_a_probability():
    X, y = _data(15, seed=5)
    gp = fit_gp(X, y, prior_mean=0.8, hyperparameters=HP)
    guarded = GuardedLimitModel(gp, lower=None, upper=0.8, deletion=True, local=True)
    Xs = np.random.default_rng(6).random((300, 2))
    for noise in (False, True):
        p0 = limit_probability(*gp.predict(Xs, include_noise=noise), upper=0.8)
        p1 = limit_probability(*guarded.predict(Xs, include_noise=noise), upper=0.8)
        assert np.all(p1 <= p0 + 1e-12)
        # the mean moves only where the sd would widen past the cap (always where the guard's
        # figure is below 1/2, which no sd gives with the mean inside the limit), towards the limit
        g_mean, g_sd, own, sd_all, _ = guarded.predict_parts(Xs, include_noise=noise)
        m = gp.predict(Xs, include_noise=noise)[0]
        np.testing.assert_array_equal(own, m)  # "with every run": the model's own mean
        moved = g_mean != m
        assert np.all(np.isclose(g_sd[moved], WIDEN_CAP * sd_all[moved])) and np.all(g_mean[moved] > m[moved])
        assert np.all(moved[(p1 < 0.5) & (m < 0.8)]) and np.all(g_sd <= WIDEN_CAP * sd_all * (1 + 1e-12))
    # the posterior over fixed points (batch fantasies) gives the same figures
    post = guarded.posterior_at(Xs)
    np.testing.assert_allclose(post.mean_sd()[1], guarded.predict(Xs)[1], rtol=1e-9)


def test_local_widening_grows_near_runs_that_came_out_worse_than_expected():
    X, y = _data(14, seed=7)
    y = y.copy()
    y[3] += 2.0  # a run far above what its neighbours suggest: an optimistic error for an upper limit
    gp = fit_gp(X, y, prior_mean=1.5, hyperparameters=HP)
    upper = GuardedLimitModel(gp, lower=None, upper=1.5, deletion=False, local=True)
    lower = GuardedLimitModel(gp, lower=1.5, upper=None, deletion=False, local=True)
    f_up = upper.local_factor(X[3:4])[0]
    assert f_up > 1.5
    assert lower.local_factor(X[3:4])[0] < f_up  # for a lower limit that error was pessimistic
    assert np.all(upper.local_factor(np.random.default_rng(8).random((50, 2))) >= 1.0)


@pytest.mark.parametrize("rule,expected_sign", [
    (LimitRule("a", None, 1.0, 0.95), +1), (LimitRule("b", 0.0, None, 0.9), -1)])
def test_a_limits_fantasy_lies_towards_the_limit(rule, expected_sign):
    class Post:
        def mean_sd(self, include_noise=False):
            return np.array([0.5, 0.4]), np.array([0.1, 0.2])
    v = _pessimistic_value(rule, Post(), 1)
    z = stats.norm.ppf(rule.probability)
    assert v == pytest.approx(0.4 + expected_sign * z * 0.2)


def test_tested_span_is_the_runs_box_pushed_out_by_its_reach():
    from guardband.safety.span import tested_span
    anchors = np.array([[0.2, 0.5], [0.4, 0.5], [0.3, 0.6]])
    lo, hi = tested_span(anchors, 0.25, 0.05)
    # x: width 0.2, pushed by 0.05 each side; y: width 0.1, pushed by the floor 0.05
    np.testing.assert_allclose(lo, [0.15, 0.45])
    np.testing.assert_allclose(hi, [0.45, 0.65])


def test_the_screen_excludes_candidates_beyond_the_tested_span_and_says_why():
    from guardband.safety.limits import ScreenRules
    from guardband.safety.screen import hard_rules, screen_points

    class Space:
        def contains(self, X):
            return np.ones(len(X), dtype=bool)

        def describe_violation(self, x):
            return ""

    rules = ScreenRules((), (), 0.9, "bound", None, 0.25, 0.05)
    anchors = np.array([[0.2, 0.5], [0.4, 0.5], [0.3, 0.6]])
    U = np.array([[0.3, 0.55], [0.44, 0.5], [0.5, 0.5], [0.3, 0.7]])
    hard = hard_rules(rules, Space(), U, U, anchors, step_basis="run that met every limit")
    res = screen_points(rules, hard, [])
    assert res.survives.tolist() == [True, True, False, False]
    assert set(res.reason[2:]) == {"beyond-tested-span"}
    assert "outside the span" in res.detail[2]
    off = ScreenRules((), (), 0.9, "bound", None, None, 0.05)  # span_reach None turns the rule off
    assert screen_points(off, hard_rules(off, Space(), U, U, anchors, step_basis="run"), []).survives.all()


def test_a_limit_model_of_runs_far_below_the_limit_does_not_claim_certainty():
    # ten runs that read almost alike, far below an upper limit of 1.0: the
    # sd of y (0.001) would make the limit look hundreds of units away; the
    # model's unit is the runs' distance from the limit instead
    from guardband.planner.step.fitting import _fit
    rng = np.random.default_rng(9)
    U = 0.3 + 0.2 * rng.random((10, 2))
    y = 0.1 + 0.001 * rng.standard_normal(10)
    model, summary = _fit("imp", "limit", U, y, prior_mean=1.0, restarts=2, warm=None, seed=1,
                          length_scale_max=0.4 * np.sqrt(2))
    assert model.scale == pytest.approx(np.sqrt(np.mean((y - 1.0) ** 2)))
    assert model.hyperparameters.signal_variance >= 1.0
    far = np.array([[0.95, 0.95]])
    p_far = limit_probability(*model.predict(far), upper=1.0)[0]
    assert p_far < 0.95  # away from the runs the model cannot vouch at 0.95
    p_at = limit_probability(*model.predict(U[:1]), upper=1.0)[0]
    assert p_at > 0.99  # at a run it still can


def test_a_new_measurement_adds_the_models_own_noise_variance_everywhere():
    # the pair behind a guarded model may take the fitted model for the latent
    # sd and the short one with noise at the same point; the measurement's sd
    # must still be the latent sd plus the one noise variance both share
    from guardband.planner.models import PessimisticLimitModel
    X, y = _data(12, seed=11)
    gp = fit_gp(X, y, prior_mean=1.2, hyperparameters=Hyperparameters(np.array([0.3, 0.4]), 1.0, 0.05))
    pair = PessimisticLimitModel.build(gp, lower=None, upper=1.2, with_prior=True)
    guarded = GuardedLimitModel(pair, lower=None, upper=1.2, deletion=False, local=False)
    Xs = np.random.default_rng(12).random((200, 2))
    _, sd_f = guarded.predict(Xs)
    _, sd_m = guarded.predict(Xs, include_noise=True)
    noise = gp.scale**2 * gp.hyperparameters.noise_variance
    np.testing.assert_allclose(sd_m**2 - sd_f**2, noise, rtol=1e-9)


def test_models_predicted_together_give_each_models_own_numbers():
    # the screen predicts several guarded limit models at once, their widenings in one bisection
    # (a side without a limit laid out as an infinite distance): the same bits as one at a time
    from guardband.planner.models.guards import predict_parts_together

    X, y = _data(n=14, seed=3)
    gp = fit_gp(X, y, prior_mean=0.5, hyperparameters=HP)
    sides = [(None, 0.6), (0.2, None), (0.1, 0.9)]
    Xs = np.random.default_rng(4).random((9, 2))
    for noise in (False, True):
        fresh = [GuardedLimitModel(gp, lower=lo, upper=up) for lo, up in sides]
        together = predict_parts_together(fresh, Xs, [noise] * len(fresh))
        for model, got in zip([GuardedLimitModel(gp, lower=lo, upper=up) for lo, up in sides], together):
            alone = model.predict_parts(Xs, include_noise=noise)
            assert [a.tobytes() for a in alone[:4]] == [a.tobytes() for a in got[:4]]
            assert list(alone[4]) == list(got[4])
        widened = [float(np.max(got[1] - got[3])) for got in together]
        assert widened[2] > 0  # a point of the two-sided limit was widened, so the bisection ran
