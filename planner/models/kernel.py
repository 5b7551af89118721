"""The Matérn 5/2 kernel and the linear algebra of exact GP regression.

The kernel has one length scale per factor (ARD)::

    k(x, x') = sf2 * (1 + sqrt(5) r + 5/3 r^2) * exp(-sqrt(5) r),
    r^2 = sum_k (x_k - x'_k)^2 / l_k^2.

The Cholesky factor of ``K + sn2 I`` takes a diagonal jitter of
``settings.JITTER_START`` times the mean diagonal, multiplied by 10 up to
``settings.JITTER_MAX`` until the factorisation succeeds. The jitter is kept
in the model (``GaussianProcess.jitter``) and acts as extra noise.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
from scipy import linalg
from scipy.spatial.distance import cdist

from guardband.planner import settings

__all__ = [
    "matern52",
    "matern_from_sr",
    "cholesky_with_jitter",
    "inverse_from_cholesky",
    "Pairwise",
    "NotPositiveDefinite",
    "not_pd_advice",
    "clip_variance",
    "SQRT5",
    "VARIANCE_ROUNDOFF",
    "PAIRWISE_CACHE_MAX",
]

#: Negative predicted variances smaller than this (relative to the signal
#: variance) are round-off and are set to zero without a warning.
VARIANCE_ROUNDOFF = 1e-10
#: The fit caches pairwise squared differences, n^2 d doubles, up to this many.
PAIRWISE_CACHE_MAX = 2**23

SQRT5 = math.sqrt(5.0)


class NotPositiveDefinite(Exception):
    """Internal: the factorisation failed even at the largest jitter."""


def matern52(X1, X2, length_scales, signal_variance) -> np.ndarray:
    """Matérn 5/2 covariance with one length scale per factor.

    Parameters
    ----------
    X1 : array of shape (n1, n_factors)
    X2 : array of shape (n2, n_factors)
    length_scales : array of shape (n_factors,)
    signal_variance : float

    Returns
    -------
    K : array of shape (n1, n2)
    """
    ls = np.asarray(length_scales, dtype=float)
    sr = cdist(np.asarray(X1, dtype=float) / ls, np.asarray(X2, dtype=float) / ls, "euclidean")
    sr *= SQRT5
    return matern_from_sr(sr, signal_variance)


def matern_from_sr(sr: np.ndarray, signal_variance: float, e: np.ndarray | None = None) -> np.ndarray:
    """``sf2 (1 + sr + sr^2 / 3) exp(-sr)`` with ``sr = sqrt(5) r``, in place where possible."""
    if e is None:
        e = np.exp(-sr)
    K = sr * sr
    K *= 1.0 / 3.0
    K += sr
    K += 1.0
    K *= e
    K *= signal_variance
    return K


def cholesky_with_jitter(K: np.ndarray, *, first_jitter: float | None = None):
    """Lower Cholesky factor of ``K + jitter I`` with adaptive jitter.

    The jitter starts at ``first_jitter`` (default ``JITTER_START`` times the
    mean diagonal) and is multiplied by 10 up to ``JITTER_MAX`` times the mean
    diagonal. Returns ``(L, jitter)``; the upper triangle of ``L`` is not
    zeroed. Raises ``NotPositiveDefinite``.
    """
    n = K.shape[0]
    mean_diag = float(np.mean(np.diag(K)))
    if not math.isfinite(mean_diag) or mean_diag <= 0.0:
        raise NotPositiveDefinite(f"mean diagonal {mean_diag!r}")
    jitter = settings.JITTER_START * mean_diag if first_jitter is None else float(first_jitter)
    largest = settings.JITTER_MAX * mean_diag
    while True:
        A = K.copy()
        A.flat[:: n + 1] += jitter
        try:
            L, _ = linalg.cho_factor(A, lower=True, overwrite_a=True, check_finite=False)
            if np.all(np.isfinite(np.diag(L))):
                return L, jitter
        except linalg.LinAlgError:
            pass
        if jitter >= largest:
            raise NotPositiveDefinite(f"jitter {jitter:.3g}")
        jitter = min(max(jitter * 10.0, settings.JITTER_START * mean_diag), largest)


def inverse_from_cholesky(L: np.ndarray) -> np.ndarray:
    """``K^-1`` from the lower Cholesky factor of ``K``, shape (n, n).

    Needed only where a formula uses ``K^-1`` itself (the gradient trace and
    the leave-one-out diagonal). LAPACK ``dpotri`` computes it from the factor
    at about a third of the cost of ``cho_solve`` with the identity (the same
    quantity); the tests check the two agree.
    """
    inv, info = linalg.lapack.dpotri(L, lower=1)
    if info != 0:
        raise NotPositiveDefinite(f"dpotri info {info}")
    lower = np.tril(inv)
    return lower + np.tril(inv, -1).T


class Pairwise:
    """Squared differences ``(x_ik - x_jk)^2`` of the training inputs, per pair i > j.

    The kernel matrix is symmetric with a known diagonal, so the search works
    on the n (n - 1) / 2 pairs below the diagonal (row-major order of the
    lower triangle, ``flat`` holds their positions in an n x n array): half
    the elementwise work of the full matrix. Cached as a (pairs, d) matrix
    when small enough, so that ``r^2`` and the length-scale gradient are
    single matrix-vector products.
    """

    def __init__(self, X: np.ndarray):
        self.X = X
        n, d = X.shape
        self.n = n
        self.i, self.j = np.tril_indices(n, -1)
        self.flat = self.i * n + self.j
        if self.i.size * d <= PAIRWISE_CACHE_MAX:
            self.D = (X[self.i] - X[self.j]) ** 2
        else:
            self.D = None

    def r2(self, inv_l2: np.ndarray) -> np.ndarray:
        """Scaled squared distances of the pairs, shape (n (n - 1) / 2,)."""
        if self.D is not None:
            return self.D @ inv_l2
        Xs = self.X * np.sqrt(inv_l2)
        return cdist(Xs, Xs, "sqeuclidean").reshape(-1)[self.flat]

    def weighted_sums(self, m: np.ndarray) -> np.ndarray:
        """``sum_pairs m_p (x_ik - x_jk)^2`` for each factor k, shape (d,)."""
        if self.D is not None:
            return m @ self.D
        out = np.empty(self.X.shape[1])
        for k in range(self.X.shape[1]):
            diff = self.X[self.i, k] - self.X[self.j, k]
            out[k] = m @ (diff * diff)
        return out


def not_pd_advice(n: int) -> str:
    """The message for a kernel matrix of ``n`` runs that no jitter made positive definite."""
    return (
        f"the kernel matrix of {n} runs is not positive definite even with jitter "
        f"{settings.JITTER_MAX:g} times its mean diagonal; runs may repeat the same factor settings "
        "while the model's noise is held at its smallest value. If the response's repeatability is "
        "known, state it as `measurement_sd` of that response in the protocol; otherwise merge or "
        "remove the repeated runs"
    )


def clip_variance(var: np.ndarray, reference: float) -> np.ndarray:
    """Set negative variances to zero; warn when they exceed round-off."""
    low = float(np.min(var)) if var.size else 0.0
    if low >= 0.0:
        return var
    if -low > VARIANCE_ROUNDOFF * reference:
        count = int(np.sum(var < 0))
        warnings.warn(
            f"{count} predicted variance(s) came out negative (down to {low:.3g}, "
            f"{-low / reference:.3g} of the signal variance) and were set to zero; "
            "the kernel matrix is ill-conditioned (runs very close together); if the response's "
            "repeatability is known, state it as `measurement_sd` in the protocol",
            RuntimeWarning,
            stacklevel=3,
        )
    return np.maximum(var, 0.0)
