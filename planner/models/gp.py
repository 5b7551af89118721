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
standard deviation of ``y`` (``ddof=0``) when no prior mean is given, else the
root-mean-square distance of ``y`` from the prior mean (so a limit model's
unit is how far its runs lie from the limit), or 1 when that is 0. On
``z`` the model is a zero-mean GP with the Matérn 5/2 kernel ``k`` of
:mod:`planner.models.kernel` (one length scale per factor, ARD; the jittered
Cholesky factor is there too) and Gaussian noise::

    f ~ GP(0, k),   z = f(X) + e,   e ~ N(0, sn2 I).

The hyperparameters ``l``, ``sf2``, ``sn2`` are in standardised units; their
priors, bounds and search are in :mod:`planner.models.hyperparameters`.
"""

from __future__ import annotations

import functools
import math
import os
from collections.abc import Mapping
from concurrent.futures import ThreadPoolExecutor
from typing import NamedTuple

import numpy as np
from scipy import linalg
from scipy.spatial.distance import cdist

from guardband.planner import settings
from guardband.planner.errors import ModelError
from guardband.planner.models.blas import blas_limit, limited_blas
from guardband.planner.models.arrays import check_data, check_points
from guardband.planner.models.hyperparameters import (
    LENGTH_SCALE_BOUNDS,
    LOG_2PI,
    ML_RUNS_PER_HYPERPARAMETER,
    NOISE_FLOOR,
    NOISE_VARIANCE_MAX,
    Hyperparameters,
    as_hyperparameters,
    log_prior_and_gradient,
    search_hyperparameters,
)
from guardband.planner.models.kernel import (
    SQRT5,
    NotPositiveDefinite,
    cholesky_with_jitter,
    clip_variance,
    inverse_from_cholesky,
    matern52,
    not_pd_advice,
)

__all__ = [
    "GaussianProcess",
    "LeaveOneOut",
    "PosteriorAt",
    "fit_gp",
    "STATUS_OK",
    "STATUS_WARNING",
]

#: A response whose sd is below this times its largest magnitude is constant.
CONSTANT_RESPONSE_RTOL = 1e-12
#: Largest point set for which a joint covariance is returned.
MAX_JOINT_COV = 5000
#: Python threads that share the chunks of a large prediction. Each chunk is
#: computed the same way on any thread (BLAS on one thread), so the result
#: does not depend on this number.
PREDICT_WORKERS = min(2, os.cpu_count() or 1)

STATUS_OK = "ok"
STATUS_WARNING = "warning"


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
            -0.5 * w @ w - np.sum(np.log(np.diag(L))) - 0.5 * n * LOG_2PI
        )
        self.log_marginal_likelihood = self.log_marginal_likelihood_standardised - n * math.log(self.scale)
        self.log_prior = log_prior_and_gradient(hyperparameters.theta)[0]
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
        X1 = check_points(X1, self.n_factors, "X1")
        X2 = X1 if X2 is None else check_points(X2, self.n_factors, "X2")
        return self.scale**2 * self._k(X1, X2)

    # -- prediction -----------------------------------------------------------
    @limited_blas
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
        Xs = check_points(Xs, self.n_factors)
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
            diag = clip_variance(np.diag(cov).copy(), hp.signal_variance)
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
        var = clip_variance(var, hp.signal_variance) + noise
        return self.prior_mean + s * mean, s * np.sqrt(var)

    @functools.cached_property
    def _prediction_parts(self):
        """``sqrt(5) / l``, the training inputs times it, and ``L^-1`` (lower)."""
        scale = SQRT5 / self.hyperparameters.length_scales
        L_inv, info = linalg.lapack.dtrtri(self._L, lower=1)
        if info != 0:
            raise ModelError(f"the Cholesky factor could not be inverted (dtrtri info {info}); {not_pd_advice(self.n_train)}")
        return scale, self.X * scale, np.asfortranarray(np.tril(L_inv))

    # -- leave-one-out --------------------------------------------------------
    @limited_blas
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
            diag = np.diag(inverse_from_cholesky(self._L)).copy()
        except NotPositiveDefinite:
            raise ModelError(not_pd_advice(self.n_train)) from None
        z = (self.y - self.prior_mean) / self.scale
        mean = self.prior_mean + self.scale * (z - self._alpha / diag)
        variance = self.scale**2 / diag
        return LeaveOneOut(mean, variance, self.y - mean)

    # -- fantasies ------------------------------------------------------------
    @limited_blas
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
        X_new = check_points(X_new, self.n_factors, "X_new")
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
            L22, _ = cholesky_with_jitter(S, first_jitter=0.0)
        except NotPositiveDefinite:
            raise ModelError(not_pd_advice(n + m)) from None
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


@limited_blas
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
        True: maximum a posteriori with the weak priors of
        :mod:`planner.models.hyperparameters`.
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
    X, y = check_data(X, y)
    n, d = X.shape
    if hyperparameters is not None and warm_start is not None:
        raise ModelError("pass either hyperparameters (fixed, no search) or warm_start (first start), not both")
    if isinstance(n_restarts, bool) or not isinstance(n_restarts, (int, np.integer)) or n_restarts < 0:
        raise ModelError(f"n_restarts must be an integer >= 0; got {n_restarts!r}")
    noise_floor = float(noise_floor)
    if not (0.0 < noise_floor < NOISE_VARIANCE_MAX):
        raise ModelError(f"noise_floor must be in (0, {NOISE_VARIANCE_MAX:g}); got {noise_floor!r}")
    if hyperparameters is not None:
        hyperparameters = as_hyperparameters(hyperparameters, d, "hyperparameters")
    if warm_start is not None:
        warm_start = as_hyperparameters(warm_start, d, "warm_start")
    if prior_mean is None:
        centre = float(np.mean(y))
    else:
        centre = float(prior_mean)
        if not math.isfinite(centre):
            raise ModelError(f"prior_mean must be a finite number; got {prior_mean!r}")

    notes: list[str] = []
    warn = False
    searched_with_priors = None  # no search: not known
    # With a stated prior mean (a limit model's sits at its limit), the unit
    # of the process is the runs' root-mean-square distance from that mean:
    # the maximum-likelihood marginal variance of a GP whose mean is known,
    # with the correlation ignored. Never smaller than the sd of y, so runs
    # that all lie far below a limit with little spread cannot make the model
    # sure of the limit (their sd would make the limit look hundreds of units
    # away); with no prior mean the scale is the sd of y.
    scale = float(np.std(y)) if prior_mean is None else float(np.sqrt(np.mean((y - centre) ** 2)))
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
        hp, search_warn, searched_with_priors = _searched_hyperparameters(
            X, z, scale, notes, warm_start=warm_start, n_restarts=n_restarts, rng=rng, noise_floor=noise_floor,
            use_priors=use_priors, length_scale_max=length_scale_max,
            ml_runs_per_hyperparameter=ml_runs_per_hyperparameter, noise_sd=noise_sd,
        )
        warn = warn or search_warn
    model = _factorised_model(X, y, z, hp, centre, scale, notes, warn)
    model.used_priors = searched_with_priors
    return model


def _searched_hyperparameters(X, z, scale, notes, *, warm_start, n_restarts, rng, noise_floor, use_priors,
                              length_scale_max, ml_runs_per_hyperparameter, noise_sd):
    """The search branch of :func:`fit_gp`: ``(hyperparameters, warn, used_priors)``; adds to ``notes``."""
    n, d = X.shape
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
    hp, search_notes, search_warn = search_hyperparameters(
        X, z, warm_start, int(n_restarts), rng, noise_floor, bool(use_priors), length_scale_max,
        fixed_noise,
    )
    notes[:0] = search_notes
    return hp, search_warn, searched_with_priors


def _factorised_model(X, y, z, hp, centre, scale, notes, warn) -> GaussianProcess:
    """The model at fixed hyperparameters: the Cholesky factor of ``K + sn2 I`` and its solves."""
    n = X.shape[0]
    Ky = matern52(X, X, hp.length_scales, hp.signal_variance)
    Ky.flat[:: n + 1] += hp.noise_variance
    try:
        L, jitter = cholesky_with_jitter(Ky)
    except NotPositiveDefinite:
        raise ModelError(not_pd_advice(n)) from None
    if jitter > settings.JITTER_START * float(np.mean(np.diag(Ky))) * (1 + 1e-9):
        warn = True
        notes.append(f"the kernel matrix needed a jitter of {jitter:.3g}")
    L = np.tril(L)
    w = linalg.solve_triangular(L, z, lower=True, check_finite=False)
    alpha = linalg.solve_triangular(L, w, lower=True, trans="T", check_finite=False)
    return GaussianProcess(
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
        Xs = check_points(Xs, model.n_factors)
        self._model = model
        self._Xs = Xs
        hp = model.hyperparameters
        with blas_limit():
            self._Ks = model._k(Xs, model.X)  # (m, n)
            self._z = self._Ks @ model._alpha  # standardised mean
            V = linalg.solve_triangular(model._L, self._Ks.T, lower=True, check_finite=False)
            self._var = clip_variance(hp.signal_variance - np.einsum("ij,ij->j", V, V), hp.signal_variance)
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

    def fantasy_direction(self, p: int = -1) -> np.ndarray:
        """How the mean at every point moves per unit of the ``p``-th conditioned point's
        standardised surprise (response units): ``scale * c_p / sqrt(s_p)``.

        If that point's result is drawn from its predictive distribution
        given the data and the points conditioned before it, as ``mean_j +
        sqrt(s_p) e`` with ``e`` standard normal, the mean everywhere moves by
        ``e`` times this vector; the variances do not depend on ``e``.
        """
        return self._model.scale * self._updates[p]

    @limited_blas
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
            raise ModelError(not_pd_advice(m.n_train + len(self._updates) + 1))
        u = c / math.sqrt(s)
        z_j = (float(y_j) - m.prior_mean) / m.scale
        self._z = self._z + u * (z_j - self._z[j]) / math.sqrt(s)
        self._var = self._var - u * u
        self._updates.append(u)