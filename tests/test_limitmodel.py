"""The pessimistic pair of a limit model: fitted model plus shortest plausible length scales."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from guardband.planner.models import PessimisticLimitModel, fit_gp, log_marginal_likelihood
from guardband.planner.models.limitmodel import F_MIN, PLAUSIBLE_NATS, shortest_plausible_factor
from guardband.planner.inputs.protocol import parse_protocol
from guardband.planner.step import plan_step
from guardband.safety.screen import limit_probability

from conftest import unit_square_protocol

RNG = np.random.default_rng(21)
U = RNG.random((14, 2))
Y = 1.5 - U[:, 0] - 2 * U[:, 1] - 0.5 * np.sin(2 * np.pi * (U[:, 0] ** 2 - 2 * U[:, 1]))  # Gramacy c1
PTS = RNG.random((300, 2))


def test_plausible_nats_is_half_the_chi_square_95_point():
    # chi-square(1) 95% point 3.841 (standard statistical tables)
    assert PLAUSIBLE_NATS == pytest.approx(3.841 / 2, abs=5e-4)


def _target(model, f):
    z = (model.y - model.prior_mean) / model.scale
    theta = model.hyperparameters.theta.copy()
    theta[: model.n_factors] += math.log(f)
    return log_marginal_likelihood(model.X, z, theta, include_prior=True)[0]


def test_shortest_factor_sits_on_the_edge_of_the_interval():
    model = fit_gp(U, Y, prior_mean=0.0, rng=0)
    assert model.used_priors is True
    f = shortest_plausible_factor(model, with_prior=True)
    base = _target(model, 1.0)
    assert F_MIN <= f < 1.0
    assert _target(model, f) >= base - PLAUSIBLE_NATS - 1e-9
    if f > F_MIN:
        assert _target(model, f * 0.995) < base - PLAUSIBLE_NATS + 1e-3


@pytest.mark.parametrize("lower, upper", [(None, 0.0), (-0.5, None), (-1.0, 0.2)])
def test_pair_takes_the_lower_probability_at_every_point(lower, upper):
    model = fit_gp(U, Y, prior_mean=0.0 if upper is not None else lower, rng=0)
    pair = PessimisticLimitModel.build(model, lower=lower, upper=upper, with_prior=True)
    m1, s1 = model.predict(PTS, include_noise=True)
    m2, s2 = pair.short.predict(PTS, include_noise=True)
    mp, sp = pair.predict(PTS, include_noise=True)
    p1 = limit_probability(m1, s1, lower=lower, upper=upper)
    p2 = limit_probability(m2, s2, lower=lower, upper=upper)
    pp = limit_probability(mp, sp, lower=lower, upper=upper)
    np.testing.assert_allclose(pp, np.minimum(p1, p2), rtol=0, atol=1e-15)
    assert np.any(p2 < p1)  # the short model does bite somewhere
    # everything else is the fitted model's
    assert pair.hyperparameters is model.hyperparameters and pair.n_train == model.n_train
    np.testing.assert_array_equal(pair.loo().mean, model.loo().mean)
    np.testing.assert_allclose(pair.short.hyperparameters.length_scales,
                               model.hyperparameters.length_scales * pair.factor, rtol=1e-12)


def test_pair_posterior_conditions_both_models():
    model = fit_gp(U, Y, prior_mean=0.0, rng=0)
    pair = PessimisticLimitModel.build(model, lower=None, upper=0.0, with_prior=True)
    post = pair.posterior_at(PTS)
    post.condition(7, -0.3)
    post.condition(100, 0.1)
    # reference: refit-free conditioning of each model, then the worse of the two
    X_new = PTS[[7, 100]]
    a = model.condition(X_new, [-0.3, 0.1]).predict(PTS, include_noise=True)
    b = pair.short.condition(X_new, [-0.3, 0.1]).predict(PTS, include_noise=True)
    pa = limit_probability(*a, upper=0.0)
    pb = limit_probability(*b, upper=0.0)
    got = limit_probability(*post.mean_sd(include_noise=True), upper=0.0)
    np.testing.assert_allclose(got, np.minimum(pa, pb), atol=1e-9)


def test_short_model_never_admits_what_the_fitted_model_excludes():
    data = unit_square_protocol(
        {"name": "c1", "upper": 0.0, "probability": 0.95}, title="short model", seed=1,
        objective={"name": "f", "direction": "minimize"},
        screen={"threshold": 0.95, "min_runs": 5}, batch={"size": 1, "pool": 1500, "refine": 0},
    )
    from guardband.planner.simulation import runs_table_from_arrays

    on = parse_protocol(data)
    off = parse_protocol({**data, "screen": {**data["screen"], "short_model": False}})
    runs = runs_table_from_arrays(on, U, {"f": U.sum(axis=1), "c1": Y})
    a, b = plan_step(on, runs, seed=3), plan_step(off, runs, seed=3)
    np.testing.assert_array_equal(a.pool, b.pool)
    assert not np.any(a.screen.survives & ~b.screen.survives)
    assert a.screen.survives.sum() < b.screen.survives.sum()
    lim = next(m for m in a.models if m.role == "limit")
    assert lim.short_factor is not None and lim.short_factor < 1
    assert next(m for m in b.models if m.role == "limit").short_factor is None


def test_pair_survives_pickling_for_worker_processes():
    import pickle

    model = fit_gp(U, Y, prior_mean=0.0, rng=0)
    pair = PessimisticLimitModel.build(model, lower=None, upper=0.0, with_prior=True)
    back = pickle.loads(pickle.dumps(pair))
    for a, b in zip(back.predict(PTS, include_noise=True), pair.predict(PTS, include_noise=True)):
        np.testing.assert_array_equal(a, b)
    assert back.factor == pair.factor and back.n_train == pair.n_train
