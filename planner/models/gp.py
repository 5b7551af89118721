"""Exact Gaussian-process regression for the response models.

We write our own rather than use ``sklearn.gaussian_process``: the planner
needs weak priors on the hyperparameters (maximum a posteriori rather than
maximum likelihood, since 8 to 60 runs is the normal case), a constant prior
mean per response (a limit model's mean sits at its limit, so that away from
the runs it claims nothing), warm starts from the last plan's values, cheap
conditioning on fantasised observations (a rank update of the Cholesky
factor rather than a refit) and closed-form leave-one-out residuals.
scikit-learn's ``GaussianProcessRegressor`` offers none of these. The tests
check this module against it with the same fixed kernel.

Model
-----
Inputs ``X`` are already scaled to the unit cube, shape (n_runs, n_factors).
Responses are standardised, ``z = (y - c) / s``: the centre ``c`` is the
prior mean (the mean of ``y`` when none is given) and the scale ``s`` is the
standard deviation of ``y`` (``ddof=0``), or 1 when ``y`` is constant. On
``z`` the model is a zero-mean GP with the Matérn 5/2 kernel, one length
scale per factor (ARD), and Gaussian noise::

    k(x, x') = sf2 * (1 + sqrt(5) r + 5/3 r^2) * exp(-sqrt(5) r),
    r^2 = sum_k (x_k - x'_k)^2 / l_k^2,
    z = f(X) + e,   e ~ N(0, sn2 I).

The hyperparameters ``l``, ``sf2``, ``sn2`` are in standardised units; in
response units the signal and noise variances are ``s^2 sf2`` and
``s^2 sn2``. The search works on ``theta = log [l_1 .. l_d, sf2, sn2]``.

Priors (independent normal on each log-hyperparameter, so log-normal on the
hyperparameter; centres and widths below are ``(centre, sd)`` of the log):

* length scale: around 0.5 (half the unit cube), sd 1.0 (about 0.07 to 3.7
  at two sd);
* signal variance: around 1 (the data's own spread), sd 1.5;
* noise variance: around 1e-2, sd 2.0, floored at ``noise_floor`` (1e-6).

When the priors apply
---------------------
The priors are for small data. By default (``use_priors=None``) they are
used while there are fewer than ``ML_RUNS_PER_HYPERPARAMETER`` (12) runs per
hyperparameter, i.e. below ``12 (n_factors + 2)`` runs: 60 runs in 3
factors, 120 in 8. From there on the fit is maximum likelihood within the
same bounds, and the restarts stop early once two starts agree
(``AGREEMENT_NATS``). ``use_priors=True`` or ``False`` forces either.

The threshold comes from ``benchmarks/models.py --small-data``: the share
of new noisy measurements inside the 95% predictive band, MAP against
maximum likelihood (ML), mean over random smooth functions:

* 3 factors: 8 runs 0.88 vs 0.68, 15 runs 0.91 vs 0.80, 30 runs 0.95 vs
  0.92, 60 runs 0.95 vs 0.94, 100 runs 0.95 vs 0.95;
* 8 factors: 15 runs 0.91 vs 0.72, 30 runs 0.99 vs 0.86, 60 runs 0.97 vs
  0.91, 100 runs 0.93 vs 0.92, 150 runs 0.94 vs 0.94.

Below the threshold ML is overconfident; above it ML is as well calibrated,
with a smaller error, and the weak length-scale prior would cost log
marginal likelihood for nothing (on W1, 300 runs in 8 factors, the MAP fits
sat 13 to 20 nats below the ML ones, mostly from factors with no effect,
whose ML length scale runs to the upper bound).

The Cholesky factor of ``K + sn2 I`` takes a diagonal jitter of
``settings.JITTER_START`` times the mean diagonal, multiplied by 10 up to
``settings.JITTER_MAX`` until the factorisation succeeds. The jitter is kept
in the model (``GaussianProcess.jitter``) and acts as extra noise.
"""

from __future__ import annotations

import contextlib
import functools
import math
import os
import threading
import warnings
from collections.abc import Mapping
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
from scipy import linalg, optimize
from scipy.spatial.distance import cdist

from guardband.planner import settings
from guardband.planner.errors import ModelError

try:  # a dependency of scikit-learn, so normally present
    from threadpoolctl import ThreadpoolController
except ImportError:  # pragma: no cover
    ThreadpoolController = None

__all__ = [
    "Hyperparameters",
    "GaussianProcess",
    "LeaveOneOut",
    "fit_gp",
    "matern52",
    "log_marginal_likelihood",
    "NOISE_FLOOR",
    "LENGTH_SCALE_PRIOR",
    "SIGNAL_VARIANCE_PRIOR",
    "NOISE_VARIANCE_PRIOR",
    "STATUS_OK",
    "STATUS_WARNING",
]

#: Prior on log length scale (unit-cube units): (centre, sd) of the log.
LENGTH_SCALE_PRIOR = (math.log(0.5), 1.0)
#: Prior on log signal variance (standardised units): (centre, sd) of the log.
SIGNAL_VARIANCE_PRIOR = (0.0, 1.5)
#: Prior on log noise variance (standardised units): (centre, sd) of the log.
NOISE_VARIANCE_PRIOR = (math.log(1e-2), 2.0)
#: Default lower bound of the noise variance (standardised units).
NOISE_FLOOR = 1e-6
#: Search bounds (not log) of each length scale (upper as scikit-learn's default).
LENGTH_SCALE_BOUNDS = (1e-3, 1e5)
#: Search bounds (not log) of the signal variance (upper as scikit-learn's default).
SIGNAL_VARIANCE_BOUNDS = (1e-4, 1e5)
#: Upper search bound (not log) of the noise variance.
NOISE_VARIANCE_MAX = 10.0
#: Iteration cap of one L-BFGS-B run.
OPTIMIZER_MAXITER = 1000
#: L-BFGS-B stops when an iteration improves the objective by less than this
#: times max(|objective|, 1) (scipy's default is 2.2e-9). On W1 1e-6 cut the
#: evaluations by a third (446 to 285) with the same optimum to 0.01 nats.
OPTIMIZER_FTOL = 1e-6
#: With ``use_priors=None`` the priors are used while the runs number fewer
#: than this many per hyperparameter (``n_factors + 2``); from then on the
#: fit is maximum likelihood. See the module notes for the measurements.
ML_RUNS_PER_HYPERPARAMETER = 12.0
#: In the maximum-likelihood regime the restarts stop once the best value
#: has been reached from two starts, to within this many nats (plus 1e-6
#: relative): with many runs the likelihood has one dominant mode, and two
#: optima within 0.5 nats (a likelihood ratio under 1.65) are equally
#: supported by the data; the better of the two is kept.
AGREEMENT_NATS = 0.5
#: From this many runs the starts run on a random subset of the runs
#: (a third, at least SUBSET_MIN_RUNS) and only the best is refined on all
#: of them; measured on W1 (benchmarks/models.py) against a full search.
SUBSET_FROM_RUNS = 250
SUBSET_MIN_RUNS = 150
#: A response whose sd is below this times its largest magnitude is constant.
CONSTANT_RESPONSE_RTOL = 1e-12
#: Negative predicted variances smaller than this (relative to the signal
#: variance) are round-off and are set to zero without a warning.
VARIANCE_ROUNDOFF = 1e-10
#: Largest point set for which a joint covariance is returned.
MAX_JOINT_COV = 5000
#: The fit caches pairwise squared differences, n^2 d doubles, up to this many.
PAIRWISE_CACHE_MAX = 2**23
#: BLAS threads while fitting, predicting, conditioning. The matrices are
#: n_runs square (hundreds) and the search factorises them hundreds of times;
#: waking BLAS threads for each costs more than it saves (measured: one thread
#: about twice as fast as two on a 2-core machine, see benchmarks/models.py),
#: and one thread gives the same bits on any machine. ``None`` leaves the
#: process's BLAS setting alone.
BLAS_THREADS = 1
#: Python threads that share the chunks of a large prediction. Each chunk is
#: computed the same way on any thread (BLAS on one thread), so the result
#: does not depend on this number.
PREDICT_WORKERS = min(2, os.cpu_count() or 1)

STATUS_OK = "ok"
STATUS_WARNING = "warning"

_SQRT5 = math.sqrt(5.0)
_LOG_2PI = math.log(2.0 * math.pi)


class _NotPositiveDefinite(Exception):
    """Internal: the factorisation failed even at the largest jitter."""


@functools.cache
def _controller():
    # created on first use, after numpy's and scipy's BLAS libraries are loaded
    return ThreadpoolController()


_blas_lock = threading.Lock()
_blas_state = {"depth": 0, "limiter": None}


@contextlib.contextmanager
def _blas_limit():
    """Hold BLAS at ``BLAS_THREADS`` threads; re-entrant and thread-safe.

    The BLAS thread count is process-wide, so model work running in several
    Python threads shares one limit: the first to enter sets it, the last to
    leave restores the previous setting.
    """
    if ThreadpoolController is None or BLAS_THREADS is None:
        yield
        return
    with _blas_lock:
        if _blas_state["depth"] == 0:
            _blas_state["limiter"] = _controller().limit(limits=BLAS_THREADS, user_api="blas")
        _blas_state["depth"] += 1
    try:
        yield
    finally:
        with _blas_lock:
            _blas_state["depth"] -= 1
            if _blas_state["depth"] == 0:
                _blas_state["limiter"].restore_original_limits()
                _blas_state["limiter"] = None


def _limited_blas(method):
    """Run ``method`` under :func:`_blas_limit`."""

    @functools.wraps(method)
    def wrapper(*args, **kwargs):
        with _blas_limit():
            return method(*args, **kwargs)

    return wrapper


# ---------------------------------------------------------------------------
# Hyperparameters


@dataclass(frozen=True, eq=False)
class Hyperparameters:
    """Kernel hyperparameters, in standardised response units.

    Parameters
    ----------
    length_scales : array of shape (n_factors,)
        One length scale per factor, unit-cube units, all > 0.
    signal_variance : float
        Prior variance of the latent response, > 0.
    noise_variance : float
        Variance of the measurement noise, > 0.
    """

    length_scales: np.ndarray
    signal_variance: float
    noise_variance: float

    def __post_init__(self):
        try:
            ls = np.array(self.length_scales, dtype=float, copy=True)
            sf2 = float(self.signal_variance)
            sn2 = float(self.noise_variance)
        except (TypeError, ValueError) as exc:
            raise ModelError(f"hyperparameters must be numbers: {exc}") from None
        if ls.ndim != 1 or ls.size == 0:
            raise ModelError(
                f"length_scales must be a 1-d list with one value per factor; got shape {ls.shape}"
            )
        if not np.all(np.isfinite(ls)) or np.any(ls <= 0):
            raise ModelError(f"length_scales must be finite and > 0; got {ls.tolist()}")
        for name, value in (("signal_variance", sf2), ("noise_variance", sn2)):
            if not math.isfinite(value) or value <= 0:
                raise ModelError(f"{name} must be finite and > 0; got {value!r}")
        ls.setflags(write=False)
        object.__setattr__(self, "length_scales", ls)
        object.__setattr__(self, "signal_variance", sf2)
        object.__setattr__(self, "noise_variance", sn2)

    def __eq__(self, other):
        if not isinstance(other, Hyperparameters):
            return NotImplemented
        return (
            np.array_equal(self.length_scales, other.length_scales)
            and self.signal_variance == other.signal_variance
            and self.noise_variance == other.noise_variance
        )

    __hash__ = None

    @property
    def n_factors(self) -> int:
        """Number of factors (length of ``length_scales``)."""
        return self.length_scales.size

    @property
    def theta(self) -> np.ndarray:
        """Log-space vector ``log [l_1 .. l_d, sf2, sn2]``, shape (n_factors + 2,)."""
        return np.log(np.concatenate([self.length_scales, [self.signal_variance, self.noise_variance]]))

    @classmethod
    def from_theta(cls, theta) -> Hyperparameters:
        """Build from a log-space vector of shape (n_factors + 2,)."""
        theta = np.asarray(theta, dtype=float)
        return cls(np.exp(theta[:-2]), math.exp(theta[-2]), math.exp(theta[-1]))

    @classmethod
    def prior_centre(cls, n_factors: int) -> Hyperparameters:
        """The hyperparameters at the centres of their priors."""
        return cls(
            np.full(n_factors, math.exp(LENGTH_SCALE_PRIOR[0])),
            math.exp(SIGNAL_VARIANCE_PRIOR[0]),
            math.exp(NOISE_VARIANCE_PRIOR[0]),
        )

    def to_dict(self) -> dict:
        """Plain floats and lists (JSON-able)."""
        return {
            "length_scales": [float(v) for v in self.length_scales],
            "signal_variance": float(self.signal_variance),
            "noise_variance": float(self.noise_variance),
        }

    @classmethod
    def from_dict(cls, data: Mapping) -> Hyperparameters:
        """Inverse of :meth:`to_dict`; unknown or missing keys raise ModelError."""
        expected = {"length_scales", "signal_variance", "noise_variance"}
        if not isinstance(data, Mapping) or set(data) != expected:
            got = sorted(data) if isinstance(data, Mapping) else type(data).__name__
            raise ModelError(f"hyperparameters need exactly the keys {sorted(expected)}; got {got}")
        return cls(data["length_scales"], data["signal_variance"], data["noise_variance"])


def _as_hyperparameters(value, n_factors: int, name: str) -> Hyperparameters:
    hp = value if isinstance(value, Hyperparameters) else Hyperparameters.from_dict(value)
    if hp.n_factors != n_factors:
        raise ModelError(
            f"{name} has {hp.n_factors} length scales but X has {n_factors} factors; "
            "pass values fitted on the same factors"
        )
    return hp


# ---------------------------------------------------------------------------
# Kernel and linear algebra


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
    sr *= _SQRT5
    return _matern_from_sr(sr, signal_variance)


def _matern_from_sr(sr: np.ndarray, signal_variance: float, e: np.ndarray | None = None) -> np.ndarray:
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


def _cholesky(K: np.ndarray, *, first_jitter: float | None = None):
    """Lower Cholesky factor of ``K + jitter I`` with adaptive jitter.

    The jitter starts at ``first_jitter`` (default ``JITTER_START`` times the
    mean diagonal) and is multiplied by 10 up to ``JITTER_MAX`` times the mean
    diagonal. Returns ``(L, jitter)``; the upper triangle of ``L`` is not
    zeroed. Raises ``_NotPositiveDefinite``.
    """
    n = K.shape[0]
    mean_diag = float(np.mean(np.diag(K)))
    if not math.isfinite(mean_diag) or mean_diag <= 0.0:
        raise _NotPositiveDefinite(f"mean diagonal {mean_diag!r}")
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
            raise _NotPositiveDefinite(f"jitter {jitter:.3g}")
        jitter = min(max(jitter * 10.0, settings.JITTER_START * mean_diag), largest)


def _inverse_from_cholesky(L: np.ndarray) -> np.ndarray:
    """``K^-1`` from the lower Cholesky factor of ``K``, shape (n, n).

    Needed only where a formula uses ``K^-1`` itself (the gradient trace and
    the leave-one-out diagonal). LAPACK ``dpotri`` computes it from the factor
    at about a third of the cost of ``cho_solve`` with the identity (the same
    quantity); the tests check the two agree.
    """
    inv, info = linalg.lapack.dpotri(L, lower=1)
    if info != 0:
        raise _NotPositiveDefinite(f"dpotri info {info}")
    lower = np.tril(inv)
    return lower + np.tril(inv, -1).T


class _Pairwise:
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


def _prior_arrays(n_factors: int):
    centre = np.array([LENGTH_SCALE_PRIOR[0]] * n_factors + [SIGNAL_VARIANCE_PRIOR[0], NOISE_VARIANCE_PRIOR[0]])
    width = np.array([LENGTH_SCALE_PRIOR[1]] * n_factors + [SIGNAL_VARIANCE_PRIOR[1], NOISE_VARIANCE_PRIOR[1]])
    return centre, width


def _log_prior(theta: np.ndarray):
    """Log density of the independent normal priors on theta, and its gradient."""
    centre, width = _prior_arrays(theta.size - 2)
    u = (theta - centre) / width
    value = float(-0.5 * u @ u - np.sum(np.log(width)) - 0.5 * theta.size * _LOG_2PI)
    return value, -u / width


def _lml_and_gradient(pairs: _Pairwise, z: np.ndarray, theta: np.ndarray):
    """Log marginal likelihood of ``z`` and its gradient in theta.

    Rasmussen & Williams (2006), eq. 2.30 and 5.9 (numbers from memory): with
    ``W = alpha alpha^T - K^-1``, ``d lml / d theta_j = 0.5 sum_ij W_ij dK_ij / d theta_j``,
    taken as elementwise sums; W and dK are symmetric, so a sum is twice the
    sum over the pairs below the diagonal plus the diagonal. For the Matérn
    5/2 kernel ``dK / d log l_k = 5/3 sf2 (1 + sqrt5 r) exp(-sqrt5 r) (x_ik - x_jk)^2 / l_k^2``
    (zero on the diagonal). Raises ``_NotPositiveDefinite``.
    """
    n = z.size
    d = theta.size - 2
    ls = np.exp(theta[:d])
    sf2 = math.exp(theta[d])
    sn2 = math.exp(theta[d + 1])
    inv_l2 = 1.0 / (ls * ls)
    sr = np.sqrt(pairs.r2(inv_l2))
    sr *= _SQRT5
    e = np.exp(-sr)
    kc = _matern_from_sr(sr, sf2, e)  # the pairs below the diagonal
    Ky = np.zeros((n, n))  # LAPACK reads the lower triangle only
    Ky.flat[pairs.flat] = kc
    Ky.flat[:: n + 1] = sf2 + sn2
    L, _ = _cholesky(Ky)
    alpha = linalg.cho_solve((L, True), z, check_finite=False)
    lml = float(-0.5 * z @ alpha - np.sum(np.log(np.diag(L))) - 0.5 * n * _LOG_2PI)
    inv, info = linalg.lapack.dpotri(L, lower=1)  # lower triangle of K^-1
    if info != 0:
        raise _NotPositiveDefinite(f"dpotri info {info}")
    w_pairs = alpha[pairs.i] * alpha[pairs.j]
    w_pairs -= inv.reshape(-1)[pairs.flat]
    w_diag_sum = float(alpha @ alpha - np.trace(inv))
    grad = np.empty(d + 2)
    g = sr + 1.0
    g *= e
    g *= w_pairs
    grad[:d] = (5.0 / 3.0 * sf2) * pairs.weighted_sums(g) * inv_l2  # 0.5 * 2 (both triangles)
    grad[d] = float(w_pairs @ kc) + 0.5 * sf2 * w_diag_sum  # dK / d log sf2 = K_f
    grad[d + 1] = 0.5 * sn2 * w_diag_sum  # dK / d log sn2 = sn2 I
    return lml, grad


@_limited_blas
def log_marginal_likelihood(X, z, theta, *, include_prior: bool = False):
    """Log marginal likelihood of standardised responses, with its gradient.

    Parameters
    ----------
    X : array of shape (n_runs, n_factors)
        Inputs in the unit cube.
    z : array of shape (n_runs,)
        Standardised responses.
    theta : array of shape (n_factors + 2,)
        ``log [l_1 .. l_d, sf2, sn2]``.
    include_prior : bool
        Add the log prior of theta (the MAP objective).

    Returns
    -------
    value : float
    gradient : array of shape (n_factors + 2,)

    Raises
    ------
    ModelError
        If the kernel matrix cannot be factorised even at the largest jitter.
    """
    X, z = _check_data(X, z)
    theta = np.asarray(theta, dtype=float)
    if theta.shape != (X.shape[1] + 2,):
        raise ModelError(f"theta must have shape ({X.shape[1] + 2},) for {X.shape[1]} factors; got {theta.shape}")
    try:
        value, grad = _lml_and_gradient(_Pairwise(X), z, theta)
    except _NotPositiveDefinite:
        raise ModelError(_not_pd_advice(X.shape[0])) from None
    if include_prior:
        lp, glp = _log_prior(theta)
        value, grad = value + lp, grad + glp
    return value, grad


def _not_pd_advice(n: int) -> str:
    return (
        f"the kernel matrix of {n} runs is not positive definite even with jitter "
        f"{settings.JITTER_MAX:g} times its mean diagonal; runs may be duplicated with the noise "
        "variance at its floor. Raise noise_floor, or merge duplicated runs"
    )


def _clip_variance(var: np.ndarray, reference: float) -> np.ndarray:
    """Set negative variances to zero; warn when they exceed round-off."""
    low = float(np.min(var)) if var.size else 0.0
    if low >= 0.0:
        return var
    if -low > VARIANCE_ROUNDOFF * reference:
        count = int(np.sum(var < 0))
        warnings.warn(
            f"{count} predicted variance(s) came out negative (down to {low:.3g}, "
            f"{-low / reference:.3g} of the signal variance) and were set to zero; "
            "the kernel matrix is ill-conditioned, consider a larger noise_floor",
            RuntimeWarning,
            stacklevel=3,
        )
    return np.maximum(var, 0.0)


# ---------------------------------------------------------------------------
# Validation


def _check_data(X, y):
    """Checked float copies of X, shape (n, d), and y, shape (n,)."""
    try:
        X = np.array(X, dtype=float, copy=True)
        y = np.array(y, dtype=float, copy=True)
    except (TypeError, ValueError) as exc:
        raise ModelError(f"X and y must be numeric arrays: {exc}") from None
    if X.ndim != 2:
        raise ModelError(f"X must have shape (n_runs, n_factors); got shape {X.shape}")
    if y.ndim != 1:
        raise ModelError(f"y must have shape (n_runs,); got shape {y.shape}")
    n, d = X.shape
    if n == 0:
        raise ModelError("no runs to fit: a model needs at least one run with a measured response")
    if d == 0:
        raise ModelError("X has no factor columns; a model needs at least one factor")
    if y.size != n:
        raise ModelError(f"y must have one value per run of X ({y.size} values != {n} runs)")
    bad_x = ~np.all(np.isfinite(X), axis=1)
    if bad_x.any():
        rows = np.flatnonzero(bad_x).tolist()
        raise ModelError(
            f"X contains NaN or infinite values in runs {_first(rows)}; correct or remove those runs before fitting"
        )
    bad_y = ~np.isfinite(y)
    if bad_y.any():
        rows = np.flatnonzero(bad_y).tolist()
        raise ModelError(
            f"y contains NaN or infinite values in runs {_first(rows)}; correct or remove those runs before fitting"
        )
    X.setflags(write=False)
    y.setflags(write=False)
    return X, y


def _first(rows: list[int], k: int = 10) -> str:
    shown = ", ".join(str(r) for r in rows[:k])
    return f"[{shown}{', ...' if len(rows) > k else ''}]"


def _check_points(Xs, n_factors: int, name: str = "Xs") -> np.ndarray:
    try:
        Xs = np.asarray(Xs, dtype=float)
    except (TypeError, ValueError) as exc:
        raise ModelError(f"{name} must be a numeric array: {exc}") from None
    if Xs.ndim != 2 or Xs.shape[1] != n_factors:
        raise ModelError(f"{name} must have shape (n_points, {n_factors}); got shape {Xs.shape}")
    if not np.all(np.isfinite(Xs)):
        rows = np.flatnonzero(~np.all(np.isfinite(Xs), axis=1)).tolist()
        raise ModelError(f"{name} contains NaN or infinite values in rows {_first(rows)}")
    return Xs


# ---------------------------------------------------------------------------
# The model


class LeaveOneOut(NamedTuple):
    """Closed-form leave-one-out predictions, in response units.

    Attributes
    ----------
    mean : array of shape (n_train,)
        Prediction of each run from all the others.
    variance : array of shape (n_train,)
        Predictive variance of each run's measurement (noise included).
    residual : array of shape (n_train,)
        ``y - mean``.
    """

    mean: np.ndarray
    variance: np.ndarray
    residual: np.ndarray


class GaussianProcess:
    """A fitted GP response model; immutable.

    Build one with :func:`fit_gp`; :meth:`condition` returns a new model.
    The constructor only stores already computed pieces.

    Attributes
    ----------
    X : array of shape (n_train, n_factors)
        Training inputs (unit cube), read-only.
    y : array of shape (n_train,)
        Training responses in response units, read-only.
    hyperparameters : Hyperparameters
        In standardised units.
    prior_mean : float
        Constant prior mean in response units; also the standardisation centre.
    scale : float
        Standardisation scale ``s`` (sd of the fitted y, or 1 if constant).
    jitter : float
        Diagonal jitter added to ``K + sn2 I`` (standardised units).
    log_marginal_likelihood : float
        ``log p(y)`` in response units: the standardised value minus
        ``n_train * log(scale)`` (change of variables ``y = c + s z``).
    log_marginal_likelihood_standardised : float
        ``log p(z)`` of the standardised responses.
    log_prior : float
        Log prior density of ``hyperparameters.theta``.
    status : str
        ``"ok"`` or ``"warning"``.
    message : str
        What the fit did, and any reason for the warning.
    n_fantasised : int
        Observations added by :meth:`condition` (the last rows of X, y).
    """

    def __init__(
        self,
        X,
        y,
        hyperparameters,
        *,
        prior_mean,
        scale,
        L,
        w,
        alpha,
        jitter,
        status,
        message,
        n_fantasised=0,
        fit_message=None,
    ):
        self.X = X
        self.y = y
        self.hyperparameters = hyperparameters
        self.prior_mean = float(prior_mean)
        self.scale = float(scale)
        self.jitter = float(jitter)
        self.status = status
        self.message = message
        self.n_fantasised = int(n_fantasised)
        self._fit_message = message if fit_message is None else fit_message
        self._L = L
        self._w = w
        self._alpha = alpha
        n = y.size
        self.log_marginal_likelihood_standardised = float(
            -0.5 * w @ w - np.sum(np.log(np.diag(L))) - 0.5 * n * _LOG_2PI
        )
        self.log_marginal_likelihood = self.log_marginal_likelihood_standardised - n * math.log(self.scale)
        self.log_prior = _log_prior(hyperparameters.theta)[0]
        #: whether the hyperparameter search used the priors (None: no search was made)
        self.used_priors = None

    @property
    def n_train(self) -> int:
        """Number of training rows (fantasised ones included)."""
        return self.y.size

    @property
    def n_factors(self) -> int:
        """Number of factors."""
        return self.X.shape[1]

    def __repr__(self):
        return (
            f"GaussianProcess(n_train={self.n_train}, n_factors={self.n_factors}, "
            f"status={self.status!r}, log_marginal_likelihood={self.log_marginal_likelihood:.6g})"
        )

    # -- kernel ---------------------------------------------------------------
    def _k(self, X1, X2):
        hp = self.hyperparameters
        return matern52(X1, X2, hp.length_scales, hp.signal_variance)

    def kernel(self, X1, X2=None) -> np.ndarray:
        """Prior covariance of the latent response, in response units.

        Parameters
        ----------
        X1 : array of shape (n1, n_factors)
        X2 : array of shape (n2, n_factors), optional (default X1)

        Returns
        -------
        array of shape (n1, n2)
            ``scale^2 * matern52(X1, X2, l, sf2)``, noise not included.
        """
        X1 = _check_points(X1, self.n_factors, "X1")
        X2 = X1 if X2 is None else _check_points(X2, self.n_factors, "X2")
        return self.scale**2 * self._k(X1, X2)

    # -- prediction -----------------------------------------------------------
    @_limited_blas
    def predict(self, Xs, *, return_cov: bool = False, include_noise: bool = False, chunk_size: int | None = None):
        """Posterior mean and sd (or joint covariance) in response units.

        Parameters
        ----------
        Xs : array of shape (n_points, n_factors)
            Points in the unit cube.
        return_cov : bool
            Return the joint covariance, shape (n_points, n_points), instead
            of the sd; at most ``MAX_JOINT_COV`` points.
        include_noise : bool
            Predict a new measurement (add the noise variance) rather than the
            latent response.
        chunk_size : int, optional
            Rows predicted at once (default ``settings.PREDICT_CHUNK_ENTRIES``
            divided by the number of training runs, at least 16).

        Returns
        -------
        mean : array of shape (n_points,)
        sd : array of shape (n_points,), or cov : array of shape (n_points, n_points)
        """
        Xs = _check_points(Xs, self.n_factors)
        hp = self.hyperparameters
        s = self.scale
        noise = hp.noise_variance if include_noise else 0.0
        m = Xs.shape[0]
        if return_cov:
            if m > MAX_JOINT_COV:
                raise ModelError(
                    f"a joint covariance of {m} points was asked for (at most {MAX_JOINT_COV}); "
                    "use return_cov=False for large candidate pools"
                )
            Ks = self._k(Xs, self.X)
            mean = self.prior_mean + s * (Ks @ self._alpha)
            V = linalg.solve_triangular(self._L, Ks.T, lower=True, check_finite=False)
            cov = self._k(Xs, Xs) - V.T @ V
            cov = 0.5 * (cov + cov.T)
            diag = _clip_variance(np.diag(cov).copy(), hp.signal_variance)
            np.fill_diagonal(cov, diag + noise)
            return mean, s * s * cov
        if chunk_size is None:
            chunk = max(16, settings.PREDICT_CHUNK_ENTRIES // max(self.n_train, 1))
        else:
            chunk = int(chunk_size)
        if chunk < 1:
            raise ModelError(f"chunk_size must be a positive integer; got {chunk_size!r}")
        mean = np.empty(m)
        var = np.empty(m)
        scale, X_scaled, L_inv = self._prediction_parts
        sf2 = hp.signal_variance
        alpha = sf2 * self._alpha

        def one_chunk(start):
            stop = min(start + chunk, m)
            # Matérn 5/2 without sf2; sqrt(5) / l is folded into the inputs
            sr = cdist(Xs[start:stop] * scale, X_scaled, "euclidean")
            e = np.negative(sr)
            np.exp(e, out=e)
            K = sr * (1.0 / 3.0)
            K += 1.0
            K *= sr
            K += 1.0
            K *= e
            mean[start:stop] = K @ alpha
            # Rasmussen & Williams (2006), Alg. 2.1, lines 5-6: v = L \ k*, var = k** - v^T v;
            # here v = sf2 L^-1 k0, one triangular product on K^T (the Fortran-order view
            # of K, so no copy), one column per candidate
            Vt = linalg.blas.dtrmm(sf2, L_inv, K.T, side=0, lower=1, trans_a=0, overwrite_b=1)
            var[start:stop] = sf2 - np.einsum("ij,ij->j", Vt, Vt)

        starts = range(0, m, chunk)
        if len(starts) > 1 and PREDICT_WORKERS > 1:
            # each chunk is computed the same way on whichever thread: same bits
            with ThreadPoolExecutor(max_workers=PREDICT_WORKERS) as pool:
                list(pool.map(one_chunk, starts))
        else:
            for start in starts:
                one_chunk(start)
        var = _clip_variance(var, hp.signal_variance) + noise
        return self.prior_mean + s * mean, s * np.sqrt(var)

    @functools.cached_property
    def _prediction_parts(self):
        """``sqrt(5) / l``, the training inputs times it, and ``L^-1`` (lower)."""
        scale = _SQRT5 / self.hyperparameters.length_scales
        L_inv, info = linalg.lapack.dtrtri(self._L, lower=1)
        if info != 0:
            raise ModelError(f"the Cholesky factor could not be inverted (dtrtri info {info}); {_not_pd_advice(self.n_train)}")
        return scale, self.X * scale, np.asfortranarray(np.tril(L_inv))

    # -- leave-one-out --------------------------------------------------------
    @_limited_blas
    def loo(self) -> LeaveOneOut:
        """Closed-form leave-one-out predictions of every training run.

        Rasmussen & Williams (2006), sec. 5.4.2 (from memory):
        ``mu_i = z_i - [K^-1 z]_i / [K^-1]_ii``, ``var_i = 1 / [K^-1]_ii``,
        with the hyperparameters and standardisation held fixed.

        Returns
        -------
        LeaveOneOut
            mean, variance (noise included) and residual, shape (n_train,) each.
        """
        try:
            diag = np.diag(_inverse_from_cholesky(self._L)).copy()
        except _NotPositiveDefinite:
            raise ModelError(_not_pd_advice(self.n_train)) from None
        z = (self.y - self.prior_mean) / self.scale
        mean = self.prior_mean + self.scale * (z - self._alpha / diag)
        variance = self.scale**2 / diag
        return LeaveOneOut(mean, variance, self.y - mean)

    # -- fantasies ------------------------------------------------------------
    @_limited_blas
    def condition(self, X_new, y_new) -> GaussianProcess:
        """A new model that also has the observations (X_new, y_new).

        The hyperparameters, prior mean and scale are kept; the Cholesky
        factor is extended by the new block,
        ``L_new = [[L, 0], [B^T, chol(C - B^T B)]]`` with ``B = L \\ K(X, X_new)``
        and ``C = K(X_new, X_new) + (sn2 + jitter) I``, instead of a refit.

        Parameters
        ----------
        X_new : array of shape (m, n_factors)
        y_new : array of shape (m,)
            Fantasised (or newly measured) responses in response units.

        Returns
        -------
        GaussianProcess
        """
        X_new = _check_points(X_new, self.n_factors, "X_new")
        try:
            y_new = np.asarray(y_new, dtype=float).reshape(-1)
        except (TypeError, ValueError) as exc:
            raise ModelError(f"y_new must be numeric: {exc}") from None
        m = X_new.shape[0]
        if y_new.size != m:
            raise ModelError(f"y_new must have one value per row of X_new ({y_new.size} values != {m} rows)")
        if not np.all(np.isfinite(y_new)):
            raise ModelError("y_new contains NaN or infinite values")
        if m == 0:
            return self
        hp = self.hyperparameters
        n = self.n_train
        B = linalg.solve_triangular(self._L, self._k(self.X, X_new), lower=True, check_finite=False)
        C = self._k(X_new, X_new)
        C.flat[:: m + 1] += hp.noise_variance + self.jitter
        S = C - B.T @ B
        S = 0.5 * (S + S.T)
        try:
            L22, _ = _cholesky(S, first_jitter=0.0)
        except _NotPositiveDefinite:
            raise ModelError(_not_pd_advice(n + m)) from None
        L = np.zeros((n + m, n + m))
        L[:n, :n] = self._L
        L[n:, :n] = B.T
        L[n:, n:] = np.tril(L22)
        z_new = (y_new - self.prior_mean) / self.scale
        w_new = linalg.solve_triangular(L22, z_new - B.T @ self._w, lower=True, check_finite=False)
        w = np.concatenate([self._w, w_new])
        alpha = linalg.solve_triangular(L, w, lower=True, trans="T", check_finite=False)
        X = np.vstack([self.X, X_new])
        y = np.concatenate([self.y, y_new])
        X.setflags(write=False)
        y.setflags(write=False)
        k = self.n_fantasised + m
        message = f"{self._fit_message}; conditioned on {k} added observation(s), hyperparameters held"
        out = GaussianProcess(
            X,
            y,
            hp,
            prior_mean=self.prior_mean,
            scale=self.scale,
            L=L,
            w=w,
            alpha=alpha,
            jitter=self.jitter,
            status=self.status,
            message=message,
            n_fantasised=k,
            fit_message=self._fit_message,
        )
        out.used_priors = self.used_priors
        return out

    def with_variances_scaled(self, c2: float, note: str) -> GaussianProcess:
        """The same model with signal and noise variance (and jitter) times ``c2``.

        The posterior mean is unchanged and every predictive sd grows by
        ``sqrt(c2)``; the factor is rescaled exactly (``L -> sqrt(c2) L``),
        no new factorisation. ``note`` is added to the message.
        """
        c2 = float(c2)
        if not (c2 > 0 and math.isfinite(c2)):
            raise ModelError(f"a variance scale must be a positive number; got {c2!r}")
        hp = self.hyperparameters
        c = math.sqrt(c2)
        out = GaussianProcess(
            self.X, self.y,
            Hyperparameters(hp.length_scales, hp.signal_variance * c2, hp.noise_variance * c2),
            prior_mean=self.prior_mean, scale=self.scale, L=self._L * c, w=self._w / c,
            alpha=self._alpha / c2, jitter=self.jitter * c2, status=self.status,
            message=f"{self.message}; {note}", n_fantasised=self.n_fantasised,
        )
        out.used_priors = self.used_priors
        return out

    def posterior_at(self, Xs) -> "PosteriorAt":
        """Posterior at a fixed set of points that fantasies update cheaply.

        See :class:`PosteriorAt`; used by the greedy batch, where each pick's
        fantasised result must update the predictions at every candidate.
        """
        return PosteriorAt(self, Xs)

    # -- record ---------------------------------------------------------------
    def to_dict(self) -> dict:
        """A JSON-able summary for the decision log (no training data)."""
        return {
            "hyperparameters": self.hyperparameters.to_dict(),
            "prior_mean": self.prior_mean,
            "scale": self.scale,
            "jitter": self.jitter,
            "log_marginal_likelihood": self.log_marginal_likelihood,
            "log_marginal_likelihood_standardised": self.log_marginal_likelihood_standardised,
            "log_prior": self.log_prior,
            "n_train": self.n_train,
            "n_fantasised": self.n_fantasised,
            "status": self.status,
            "message": self.message,
        }


# ---------------------------------------------------------------------------
# Fitting


def _bounds(n_factors: int, noise_floor: float, length_scale_max: float | None = None) -> np.ndarray:
    top = LENGTH_SCALE_BOUNDS[1] if length_scale_max is None else min(LENGTH_SCALE_BOUNDS[1], length_scale_max)
    rows = [np.log([LENGTH_SCALE_BOUNDS[0], top])] * n_factors
    rows.append(np.log(SIGNAL_VARIANCE_BOUNDS))
    rows.append(np.log([noise_floor, NOISE_VARIANCE_MAX]))
    return np.array(rows)


def _starts(z, n_factors, bounds, warm_start, n_restarts, rng) -> list[np.ndarray]:
    """First start (warm start, or a guess from the data), then prior draws."""
    if warm_start is not None:
        first = warm_start.theta
    else:
        centre, _ = _prior_arrays(n_factors)
        first = centre.copy()
        # signal variance: the spread of z about the prior mean (1 when centred at the mean)
        first[n_factors] = math.log(max(float(np.mean(z * z)), 1e-2))
    starts = [np.clip(first, bounds[:, 0], bounds[:, 1])]
    centre, width = _prior_arrays(n_factors)
    for _ in range(n_restarts):
        draw = centre + width * rng.standard_normal(centre.size)
        starts.append(np.clip(draw, bounds[:, 0], bounds[:, 1]))
    return starts


def _search(X, z, starts, bounds, use_priors=True, stop_when_agreed=False):
    """L-BFGS-B on the negative log posterior (or likelihood) from each start.

    With ``stop_when_agreed`` the starts after the second are skipped once
    the best value so far has been reached from two starts (``AGREEMENT_NATS``).
    """
    pairs = _Pairwise(X)

    def objective(theta):
        try:
            value, grad = _lml_and_gradient(pairs, z, theta)
        except _NotPositiveDefinite:
            # back off: L-BFGS-B's line search shortens the step
            return math.inf, np.zeros_like(theta)
        if use_priors:
            lp, glp = _log_prior(theta)
            value, grad = value + lp, grad + glp
        if not math.isfinite(value):
            return math.inf, np.zeros_like(theta)
        return -value, -grad

    results = []
    for x0 in starts:
        res = optimize.minimize(
            objective,
            x0,
            jac=True,
            method="L-BFGS-B",
            bounds=bounds,
            options={"maxiter": OPTIMIZER_MAXITER, "ftol": OPTIMIZER_FTOL},
        )
        results.append(res)
        if stop_when_agreed and _agreed(results):
            break
    return results


def _agreed(results) -> bool:
    """True when the two best finite optima agree within ``AGREEMENT_NATS``."""
    values = sorted(r.fun for r in results if math.isfinite(r.fun))
    if len(values) < 2:
        return False
    return values[1] - values[0] <= AGREEMENT_NATS + 1e-6 * abs(values[0])


def _map_fit(X, z, warm_start, n_restarts, rng, noise_floor, use_priors=True, length_scale_max=None,
             fixed_noise=None):
    """MAP (or maximum-likelihood) hyperparameters by L-BFGS-B from several starts.

    In the maximum-likelihood regime the restarts stop once two starts agree.
    Returns ``(hyperparameters, notes, warn)``.
    """
    n, d = X.shape
    generator = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(0 if rng is None else rng)
    bounds = _bounds(d, noise_floor, length_scale_max)
    if fixed_noise is not None:
        bounds[d + 1] = math.log(fixed_noise)
    starts = _starts(z, d, bounds, warm_start, n_restarts, generator)
    subset_note = ""
    results = None
    if n >= SUBSET_FROM_RUNS:
        # the starts run on a random third of the runs (a ninth to a
        # twenty-seventh of the cost of each factorisation), then the best
        # is polished on all of them
        m = max(SUBSET_MIN_RUNS, n // 3)
        idx = np.sort(generator.choice(n, size=m, replace=False))
        sub = _search(X[idx], z[idx], starts, bounds, use_priors, stop_when_agreed=not use_priors)
        sub_finite = [r for r in sub if math.isfinite(r.fun)]
        if sub_finite:
            seed_x = min(sub_finite, key=lambda r: r.fun).x
            results = _search(X, z, [seed_x], bounds, use_priors)
            ran_sub = f"{len(sub)} of {len(starts)}" if len(sub) < len(starts) else f"{len(starts)}"
            subset_note = f"{ran_sub} start(s) on a random {m} of the {n} runs, the best then refined on all"
    if results is None or not any(math.isfinite(r.fun) for r in results):
        results = _search(X, z, starts, bounds, use_priors, stop_when_agreed=not use_priors)
        subset_note = ""
    finite = [r for r in results if math.isfinite(r.fun)]
    if not finite:
        raise ModelError("the hyperparameter search failed from every start: " + _not_pd_advice(n))
    best = min(finite, key=lambda r: r.fun)
    converged = sum(bool(r.success) for r in results)
    what = "MAP search" if use_priors else "maximum-likelihood search (no priors)"
    target = "log posterior" if use_priors else "log likelihood"
    if subset_note:
        ran = subset_note
    elif len(results) < len(starts):
        ran = f"{len(results)} of {len(starts)} start(s) (two agreed)"
    else:
        ran = f"{len(starts)} start(s)"
    notes = [f"{what} from {ran}, {converged} converged; best {target} {-best.fun:.6g}"]
    warn = False
    if not best.success:
        warn = True
        notes.append(f"the best start stopped before converging ({best.message})")
    at_upper = np.flatnonzero(best.x[:d] >= bounds[:d, 1] - 1e-8).tolist()
    if at_upper:
        notes.append(
            f"length scale of factor(s) {at_upper} at the upper bound {math.exp(bounds[0, 1]):g}"
            + (" (no visible effect)" if length_scale_max is None else " (capped)")
        )
    if fixed_noise is None and best.x[d + 1] <= bounds[d + 1, 0] + 1e-8:
        notes.append(f"noise variance at its floor {noise_floor:g}")
    return Hyperparameters.from_theta(best.x), notes, warn


@_limited_blas
def fit_gp(
    X,
    y,
    *,
    prior_mean: float | None = None,
    n_restarts: int = 4,
    warm_start: Hyperparameters | Mapping | None = None,
    rng: int | np.random.Generator | None = None,
    noise_floor: float = NOISE_FLOOR,
    optimize: bool = True,
    hyperparameters: Hyperparameters | Mapping | None = None,
    use_priors: bool | None = None,
    length_scale_max: float | None = None,
    ml_runs_per_hyperparameter: float = ML_RUNS_PER_HYPERPARAMETER,
    noise_sd: float | None = None,
) -> GaussianProcess:
    """Fit a GP response model by maximum a posteriori hyperparameters.

    Parameters
    ----------
    X : array of shape (n_runs, n_factors)
        Inputs already scaled to the unit cube.
    y : array of shape (n_runs,)
        Responses in response units; replicates and duplicated inputs allowed.
    prior_mean : float, optional
        Constant prior mean in response units (e.g. a limit); default the
        mean of y. It is also the standardisation centre.
    n_restarts : int
        Starts drawn from the prior, in addition to the first start.
    warm_start : Hyperparameters or dict, optional
        The first start of the search (e.g. the last plan's values).
    rng : int or numpy.random.Generator, optional
        Seed of the restarts; ``None`` means seed 0, so fits are repeatable.
    noise_floor : float
        Lower search bound of the noise variance (standardised units).
    optimize : bool
        If False, no search: use ``warm_start`` or the prior centres.
    hyperparameters : Hyperparameters or dict, optional
        Fixed hyperparameters; when given no search is made.
    use_priors : bool, optional
        True: maximum a posteriori with the weak priors of this module.
        False: maximum likelihood within the same bounds; with few runs it
        tends to be overconfident. None (default): the priors while there
        are fewer than ``ml_runs_per_hyperparameter * (n_factors + 2)`` runs.
    length_scale_max : float, optional
        Upper search bound of every length scale (unit-cube units). A limit
        model uses it so that its correlation with the runs fades within the
        design range: far from the runs it returns to its prior mean (the
        limit) instead of carrying a constant response everywhere.
    ml_runs_per_hyperparameter : float
        Runs per hyperparameter from which ``use_priors=None`` means
        maximum likelihood (default ``ML_RUNS_PER_HYPERPARAMETER``).
    noise_sd : float, optional
        Known measurement sd in response units: the noise variance is fixed
        at ``(noise_sd / scale)^2`` (at least ``noise_floor``) instead of
        being searched.

    Returns
    -------
    GaussianProcess

    Raises
    ------
    ModelError
        No runs, NaN or infinite values, bad options, or a kernel matrix that
        cannot be factorised.
    """
    X, y = _check_data(X, y)
    n, d = X.shape
    if hyperparameters is not None and warm_start is not None:
        raise ModelError("pass either hyperparameters (fixed, no search) or warm_start (first start), not both")
    if isinstance(n_restarts, bool) or not isinstance(n_restarts, (int, np.integer)) or n_restarts < 0:
        raise ModelError(f"n_restarts must be an integer >= 0; got {n_restarts!r}")
    noise_floor = float(noise_floor)
    if not (0.0 < noise_floor < NOISE_VARIANCE_MAX):
        raise ModelError(f"noise_floor must be in (0, {NOISE_VARIANCE_MAX:g}); got {noise_floor!r}")
    if hyperparameters is not None:
        hyperparameters = _as_hyperparameters(hyperparameters, d, "hyperparameters")
    if warm_start is not None:
        warm_start = _as_hyperparameters(warm_start, d, "warm_start")
    if prior_mean is None:
        centre = float(np.mean(y))
    else:
        centre = float(prior_mean)
        if not math.isfinite(centre):
            raise ModelError(f"prior_mean must be a finite number; got {prior_mean!r}")

    notes: list[str] = []
    warn = False
    searched_with_priors = None  # no search: not known
    scale = float(np.std(y))
    if scale <= CONSTANT_RESPONSE_RTOL * float(np.max(np.abs(y))):
        scale = 1.0
        warn = True
        what = "one run" if n == 1 else "the response is constant"
        notes.append(f"{what} (sd 0): scale set to 1 in response units")
    z = (y - centre) / scale

    if hyperparameters is not None:
        hp = hyperparameters
        notes.insert(0, "hyperparameters fixed by the caller (no search)")
    elif n == 1:
        hp = Hyperparameters.prior_centre(d)
        notes.insert(
            0,
            "one run: hyperparameters held at their prior centres (no search); "
            "away from the run the model returns to the prior mean",
        )
    elif not optimize:
        hp = warm_start if warm_start is not None else Hyperparameters.prior_centre(d)
        origin = "the warm start" if warm_start is not None else "their prior centres"
        notes.insert(0, f"no search: hyperparameters from {origin}")
    else:
        if length_scale_max is not None and not (length_scale_max > LENGTH_SCALE_BOUNDS[0]):
            raise ModelError(f"length_scale_max must exceed {LENGTH_SCALE_BOUNDS[0]:g}; got {length_scale_max!r}")
        if use_priors is None:
            if not (ml_runs_per_hyperparameter >= 0):
                raise ModelError(f"ml_runs_per_hyperparameter must be >= 0; got {ml_runs_per_hyperparameter!r}")
            use_priors = n < ml_runs_per_hyperparameter * (d + 2)
            notes.append(
                f"{n} runs for {d + 2} hyperparameters: "
                + ("weak priors (small data)" if use_priors else
                   f"maximum likelihood (at least {ml_runs_per_hyperparameter:g} runs per hyperparameter)")
            )
        searched_with_priors = bool(use_priors)
        fixed_noise = None
        if noise_sd is not None:
            if not (math.isfinite(noise_sd) and noise_sd >= 0):
                raise ModelError(f"noise_sd must be a finite number >= 0; got {noise_sd!r}")
            fixed_noise = min(max((noise_sd / scale) ** 2, noise_floor), NOISE_VARIANCE_MAX)
            notes.append(f"noise variance fixed at {fixed_noise:.3g} (standardised) by the known measurement sd {noise_sd:g}")
        hp, search_notes, search_warn = _map_fit(
            X, z, warm_start, int(n_restarts), rng, noise_floor, bool(use_priors), length_scale_max,
            fixed_noise,
        )
        notes[:0] = search_notes
        warn = warn or search_warn

    Ky = matern52(X, X, hp.length_scales, hp.signal_variance)
    Ky.flat[:: n + 1] += hp.noise_variance
    try:
        L, jitter = _cholesky(Ky)
    except _NotPositiveDefinite:
        raise ModelError(_not_pd_advice(n)) from None
    if jitter > settings.JITTER_START * float(np.mean(np.diag(Ky))) * (1 + 1e-9):
        warn = True
        notes.append(f"the kernel matrix needed a jitter of {jitter:.3g}")
    L = np.tril(L)
    w = linalg.solve_triangular(L, z, lower=True, check_finite=False)
    alpha = linalg.solve_triangular(L, w, lower=True, trans="T", check_finite=False)
    model = GaussianProcess(
        X,
        y,
        hp,
        prior_mean=centre,
        scale=scale,
        L=L,
        w=w,
        alpha=alpha,
        jitter=jitter,
        status=STATUS_WARNING if warn else STATUS_OK,
        message="; ".join(notes),
    )
    model.used_priors = searched_with_priors
    return model


class PosteriorAt:
    """Posterior mean and variance at fixed points, with O(n m) fantasy updates.

    Conditioning the model on an observation at one of the points ``j`` and
    predicting again at all ``m`` points costs a triangular solve of order
    n^2 m; this class gets the same numbers from a rank-one update. With
    ``c = cov(f(Xs), f(x_j) | data)`` and ``s = var(f(x_j) | data) + sn2 +
    jitter`` (the same diagonal :meth:`GaussianProcess.condition` uses),

        mean <- mean + c (z_j - mean_j) / s,    var <- var - c^2 / s,

    and ``c`` itself is ``k(Xs, x_j) - k(Xs, X) K^-1 k(X, x_j)`` minus the
    earlier updates' terms (the standard sequential form of the GP
    posterior; Rasmussen & Williams 2006, eq. 2.24, applied one point at a
    time). Tests check it against ``condition`` followed by ``predict``.
    Works in standardised units inside; returns response units.
    """

    def __init__(self, model: GaussianProcess, Xs):
        Xs = _check_points(Xs, model.n_factors)
        self._model = model
        self._Xs = Xs
        hp = model.hyperparameters
        with _blas_limit():
            self._Ks = model._k(Xs, model.X)  # (m, n)
            self._z = self._Ks @ model._alpha  # standardised mean
            V = linalg.solve_triangular(model._L, self._Ks.T, lower=True, check_finite=False)
            self._var = _clip_variance(hp.signal_variance - np.einsum("ij,ij->j", V, V), hp.signal_variance)
        self._updates: list[np.ndarray] = []  # u_p = c_p / sqrt(s_p), each (m,)

    @property
    def n_points(self) -> int:
        return self._Xs.shape[0]

    def mean_sd(self, *, include_noise: bool = False) -> tuple[np.ndarray, np.ndarray]:
        """Mean and sd at the points, in response units."""
        m = self._model
        noise = m.hyperparameters.noise_variance if include_noise else 0.0
        var = np.maximum(self._var, 0.0) + noise
        return m.prior_mean + m.scale * self._z, m.scale * np.sqrt(var)

    @_limited_blas
    def condition(self, j: int, y_j: float) -> None:
        """Add an observation ``y_j`` (response units) at point ``j``, in place."""
        m = self._model
        hp = m.hyperparameters
        xj = self._Xs[j : j + 1]
        kj = m._k(self._Xs, xj)[:, 0]  # (m,)
        a = linalg.cho_solve((m._L, True), self._Ks[j], check_finite=False)  # K^-1 k(X, x_j)
        c = kj - self._Ks @ a
        for u in self._updates:
            c -= u * u[j]
        s = c[j] + hp.noise_variance + m.jitter
        if not s > 0:
            raise ModelError(_not_pd_advice(m.n_train + len(self._updates) + 1))
        u = c / math.sqrt(s)
        z_j = (float(y_j) - m.prior_mean) / m.scale
        self._z = self._z + u * (z_j - self._z[j]) / math.sqrt(s)
        self._var = self._var - u * u
        self._updates.append(u)
