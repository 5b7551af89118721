"""Continuous sample paths of a fitted Gaussian-process model, for "a truth like what we know".

A draw is a whole function over the design space, not values at a fixed set
of points, so a simulated campaign can measure it anywhere.

Prior paths: random Fourier features
------------------------------------
Rahimi & Recht (2007), "Random features for large-scale kernel machines":
a stationary kernel is the Fourier transform of a spectral density p(w);
with ``w_j ~ p`` and ``b_j ~ U(0, 2 pi)``,
``phi(x) = sqrt(2 / D) cos(W x + b)`` has ``E[phi(x) . phi(x')] = k(x, x') / sf2``.
For the Matérn kernel of smoothness nu with length scales l_k, the spectral
density is proportional to ``(2 nu + sum_k l_k^2 w_k^2)^-(nu + d/2)``
(Rasmussen & Williams 2006, eq. 4.15, with the length scales per factor):
a multivariate Student-t with 2 nu degrees of freedom (5 for Matérn 5/2)
and scale matrix ``diag(1 / l_k^2)``. So ``w = z / l * sqrt(2 nu / u)``,
``z ~ N(0, I)``, ``u ~ chi-square(2 nu)``. A prior path is
``sqrt(sf2) phi(x) . a`` with ``a ~ N(0, I_D)``.

Posterior paths: pathwise conditioning
--------------------------------------
Wilson et al. (2020), "Efficiently sampling functions from Gaussian process
posteriors" (Matheron's rule): with a prior path f and noise draws e at the
runs, ``f(x) + k(x, X) (K + sn2 I)^-1 (y - f(X) - e)`` is a draw of the
posterior. The update term is exact; only the prior part is approximated
by the D features.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import linalg

from guardband.planner.models.kernel import matern52

__all__ = ["MATERN_NU", "N_FEATURES", "matern52_features", "PriorPath", "prior_path", "PosteriorPath",
           "posterior_path"]

#: Smoothness of the kernel (Matérn 5/2).
MATERN_NU = 2.5
#: Random features per path.
N_FEATURES = 1000
#: Rows evaluated at once (bounds the (rows x features) work array).
_CHUNK = 4096


def matern52_features(length_scales, n_features: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Frequencies and phases of random Fourier features of the Matérn 5/2 kernel.

    Parameters
    ----------
    length_scales : array of shape (d,)
    n_features : int
    rng : numpy.random.Generator

    Returns
    -------
    W : ndarray of shape (n_features, d)
        Rows drawn from the Student-t spectral density (2 nu = 5 degrees of freedom).
    b : ndarray of shape (n_features,)
        Phases, uniform on [0, 2 pi).
    """
    ls = np.asarray(length_scales, dtype=float)
    z = rng.standard_normal((int(n_features), ls.size))
    u = rng.chisquare(2.0 * MATERN_NU, size=int(n_features))
    W = z / ls * np.sqrt(2.0 * MATERN_NU / u)[:, None]
    b = rng.uniform(0.0, 2.0 * math.pi, size=int(n_features))
    return W, b


@dataclass(frozen=True)
class PriorPath:
    """``sqrt(sf2) sqrt(2 / D) cos(U W^T + b) @ a``: one prior draw, a function of U (unit cube)."""

    W: np.ndarray
    b: np.ndarray
    a: np.ndarray
    signal_variance: float

    def __call__(self, U) -> np.ndarray:
        U = np.atleast_2d(np.asarray(U, dtype=float))
        out = np.empty(U.shape[0])
        c = math.sqrt(2.0 * self.signal_variance / self.b.size)
        for start in range(0, U.shape[0], _CHUNK):
            Z = U[start:start + _CHUNK] @ self.W.T
            Z += self.b
            np.cos(Z, out=Z)
            out[start:start + _CHUNK] = c * (Z @ self.a)
        return out


def prior_path(length_scales, signal_variance: float, rng: np.random.Generator,
               n_features: int = N_FEATURES) -> PriorPath:
    """One prior draw of a zero-mean GP with the Matérn 5/2 kernel."""
    W, b = matern52_features(length_scales, n_features, rng)
    return PriorPath(W, b, rng.standard_normal(int(n_features)), float(signal_variance))


@dataclass(frozen=True)
class PosteriorPath:
    """One posterior draw of a fitted model, in response units, a function of U (unit cube).

    ``centre + scale * (prior(U) + k(U, X) @ v)`` (see the module notes).
    """

    prior: PriorPath
    X: np.ndarray
    v: np.ndarray
    length_scales: np.ndarray
    centre: float
    scale: float

    def __call__(self, U) -> np.ndarray:
        U = np.atleast_2d(np.asarray(U, dtype=float))
        out = self.prior(U)
        for start in range(0, U.shape[0], _CHUNK):
            K = matern52(U[start:start + _CHUNK], self.X, self.length_scales, self.prior.signal_variance)
            out[start:start + _CHUNK] += K @ self.v
        return self.centre + self.scale * out


def posterior_path(model, rng: np.random.Generator, n_features: int = N_FEATURES) -> PosteriorPath:
    """One posterior draw of a fitted :class:`~guardband.planner.models.gp.GaussianProcess`.

    Parameters
    ----------
    model : GaussianProcess
        Its training inputs, standardisation and hyperparameters (the
        jitter counts as noise, as in the model).
    rng : numpy.random.Generator
    n_features : int

    Returns
    -------
    PosteriorPath
    """
    hp = model.hyperparameters
    X = np.asarray(model.X, dtype=float)
    z = (np.asarray(model.y, dtype=float) - model.prior_mean) / model.scale
    noise = float(hp.noise_variance) + float(model.jitter)
    prior = prior_path(hp.length_scales, hp.signal_variance, rng, n_features)
    e = rng.normal(0.0, math.sqrt(noise), size=z.size)
    K = matern52(X, X, hp.length_scales, hp.signal_variance)
    K.flat[:: z.size + 1] += noise
    v = linalg.cho_solve(linalg.cho_factor(K, lower=True), z - prior(X) - e)
    return PosteriorPath(prior, X.copy(), v, np.asarray(hp.length_scales, dtype=float).copy(),
                         float(model.prior_mean), float(model.scale))
