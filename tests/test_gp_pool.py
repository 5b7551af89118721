"""PosteriorAt: rank-one fantasy updates agree with condition() + predict()."""

import numpy as np
import pytest

from guardband.planner.models import fit_gp


@pytest.mark.parametrize("prior_mean", [None, 1.5], ids=["data-mean", "at-limit"])
def test_rank_one_updates_match_refactorised_model(prior_mean):
    rng = np.random.default_rng(0)
    X = rng.random((30, 3))
    y = np.sin(3 * X[:, 0]) + X[:, 1] ** 2 + 0.05 * rng.normal(size=30)
    model = fit_gp(X, y, rng=0, prior_mean=prior_mean)
    U = rng.random((400, 3))
    pool = model.posterior_at(U)
    mu, sd = model.predict(U)
    a, b = pool.mean_sd()
    np.testing.assert_allclose(a, mu, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(b, sd, rtol=1e-12, atol=1e-12)
    ref = model
    for j, yj in [(5, 0.3), (17, 1.2), (99, -0.4), (5, 0.31)]:  # a repeat at one point too
        pool.condition(j, yj)
        ref = ref.condition(U[j : j + 1], [yj])
    for noise in (False, True):
        mu, sd = ref.predict(U, include_noise=noise)
        a, b = pool.mean_sd(include_noise=noise)
        # agreement to round-off of two different factorisations
        np.testing.assert_allclose(a, mu, rtol=1e-9, atol=1e-9)
        np.testing.assert_allclose(b, sd, rtol=1e-7, atol=1e-9)
