"""Sample paths of the Matérn 5/2 kernel by random Fourier features (Rahimi & Recht 2007), and posterior paths."""

from __future__ import annotations

import math

import numpy as np

from guardband.planner.models.gp import fit_gp
from guardband.planner.models.kernel import matern52
from guardband.planner.simulation.paths import PriorPath, posterior_path, prior_path

#: Monte Carlo tolerance: every entry within this many standard errors of its
#: estimate (the standard error measured from the same draws). For 21 entries
#: the chance of a false alarm is below 21 * 7e-6.
Z_TOL = 4.5

LS = np.array([0.3, 0.6])
SF2 = 1.7
U = np.array([[0.1, 0.2], [0.15, 0.25], [0.3, 0.2], [0.5, 0.7], [0.9, 0.1], [0.1, 0.9]])


def _second_moments(paths: np.ndarray):
    """E[f_i f_j] estimated from zero-mean draws (rows), and its standard error per entry."""
    prod = paths[:, :, None] * paths[:, None, :]
    return prod.mean(axis=0), prod.std(axis=0) / math.sqrt(paths.shape[0])


def _worst(C, se, K) -> float:
    return float(np.max(np.abs(C - K) / se))


def test_random_feature_draws_have_the_matern52_covariance():
    # Rahimi & Recht (2007): E[phi(x) phi(x')] = k(x, x'); each draw has new features, so the
    # empirical covariance is unbiased for the kernel matrix (Rasmussen & Williams 2006, eq. 4.17)
    rng = np.random.default_rng(20260)
    draws = np.array([prior_path(LS, SF2, rng, n_features=100)(U) for _ in range(10000)])
    C, se = _second_moments(draws)
    K = matern52(U, U, LS, SF2)
    assert _worst(C, se, K) < Z_TOL
    # the check has power: a Gaussian spectral density (the squared-exponential kernel) is refused
    rng = np.random.default_rng(20261)
    wrong = []
    for _ in range(10000):
        W = rng.standard_normal((100, 2)) / LS
        wrong.append(PriorPath(W, rng.uniform(0, 2 * np.pi, 100), rng.standard_normal(100), SF2)(U))
    C, se = _second_moments(np.array(wrong))
    assert _worst(C, se, K) > Z_TOL + 2


def test_posterior_paths_have_the_model_mean_and_variance():
    # Wilson et al. (2020), pathwise conditioning: draws of the posterior, so their mean and
    # variance at new points are the model's predictive mean and latent variance
    rng = np.random.default_rng(5)
    X = rng.uniform(size=(8, 2))
    y = np.sin(4 * X[:, 0]) + X[:, 1] ** 2 + rng.normal(0, 0.05, 8)
    model = fit_gp(X, y, rng=0)
    Xs = np.array([[0.2, 0.3], [0.5, 0.5], [0.95, 0.9], [0.0, 1.0]])
    mean, sd = model.predict(Xs)
    draws = np.array([posterior_path(model, rng, n_features=200)(Xs) for _ in range(4000)])
    se_mean = draws.std(axis=0) / math.sqrt(draws.shape[0])
    assert np.all(np.abs(draws.mean(axis=0) - mean) < Z_TOL * se_mean)
    # the variance of n normal draws has relative standard error sqrt(2 / (n - 1))
    rel = np.abs(draws.var(axis=0, ddof=1) / sd**2 - 1)
    assert np.all(rel < Z_TOL * math.sqrt(2 / (draws.shape[0] - 1)))


def test_a_path_is_one_function():
    rng = np.random.default_rng(1)
    path = prior_path(LS, SF2, rng)
    assert np.array_equal(path(U), path(U))
    np.testing.assert_allclose(path(U[:3]), path(U)[:3], rtol=1e-12)
