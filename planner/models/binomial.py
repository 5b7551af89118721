"""A Gaussian process on the logit of a rate, with a binomial likelihood (Laplace approximation).

A binomial response (events among subjects, for example dose-limiting
toxicities in a cohort) is modelled as

    f ~ GP(m0, k),    events_i ~ Binomial(subjects_i, expit(f(x_i))),

with ``k`` the Matérn 5/2 kernel of :mod:`planner.models.kernel` and the
constant prior mean ``m0`` at the logit of the limit, so that far from the
runs the rate sits at the limit and a dose never tried claims nothing. The
posterior of ``f`` is approximated by the Laplace method of Rasmussen &
Williams (2006, *Gaussian Processes for Machine Learning*, Algorithms 3.1
and 3.2), with the binomial log likelihood in place of the Bernoulli one:

    d log p / d f_i = k_i - n_i p_i,    W_ii = n_i p_i (1 - p_i),   p_i = expit(f_i).

The latent posterior at new points is Gaussian, N(mu, sd^2); since the rate
is a monotone function of ``f``, P(rate <= L) = Phi((logit L - mu) / sd)
exactly under that Gaussian (no further approximation), which is how the
screen judges a binomial limit (:mod:`guardband.safety.screen`). Every rate
this module returns lies in [0, 1].

Why our own
-----------
scikit-learn's ``GaussianProcessClassifier`` fits a Bernoulli likelihood
(one 0/1 row per subject) with zero prior mean, takes no prior on the
hyperparameters and gives no latent predictive variance at new points. The
screen needs a prior mean at the limit's logit, weak priors for small data
(maximum a posteriori, as for the other models, :mod:`.hyperparameters`),
the latent mean and variance, rank-one fantasy updates for the batch, and
cohorts as counts. The tests check the fit against
``GaussianProcessClassifier`` on the same data expanded to one row per
subject with the same fixed kernel and zero prior mean (posterior mode,
latent predictive mean and variance), and a lone cohort against the
Beta(k + 1/2, n - k + 1/2) posterior (``tests/test_binomial.py``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import linalg, optimize
from scipy.special import expit, gammaln, log_expit, roots_hermitenorm

from guardband.planner.errors import ModelError
from guardband.planner.models.arrays import check_points
from guardband.planner.models.blas import limited_blas
from guardband.planner.models.hyperparameters import LENGTH_SCALE_BOUNDS, LENGTH_SCALE_PRIOR
from guardband.planner.models.kernel import clip_variance, matern52
from guardband.planner.settings import Z95

__all__ = ["BinomialHyperparameters", "BinomialGP", "fit_binomial_gp", "rate_band", "logit",
           "LOGIT_SIGNAL_VARIANCE_PRIOR"]

#: Prior on log sf2 of the latent logit, (centre, sd): around sf = 2 on the
#: logit scale (a rate moving from 0.12 to 0.5 within one sd), sd 1.0, so
#: about sf 0.7 to 5.4 at two sd. Dose-toxicity curves of the trade span a
#: few logit units over the dose range.
LOGIT_SIGNAL_VARIANCE_PRIOR = (math.log(4.0), 1.0)
#: Bounds of sf2 on the logit scale.
LOGIT_SIGNAL_VARIANCE_BOUNDS = (1e-2, 1e2)
#: Newton iterations of the mode search, and its stopping rule (change of the objective, nats).
NEWTON_MAX_ITER = 100
NEWTON_TOL = 1e-10
#: Gauss-Hermite nodes for expectations over the latent Gaussian (leave-one-out predictive of counts).
QUADRATURE_NODES = 32


def logit(p):
    """log(p / (1 - p)); -inf at 0 and +inf at 1."""
    p = np.asarray(p, dtype=float)
    with np.errstate(divide="ignore"):
        return np.log(p) - np.log1p(-p)


def rate_band(mean, sd, z: float = Z95):
    """(median, lower, upper) of the rate for a latent N(mean, sd^2): expit of mean and of mean -/+ z sd.

    The rate is a monotone function of the latent, so these are the median
    and the central interval of the rate itself; all lie in [0, 1].
    """
    mean, sd = np.asarray(mean, dtype=float), np.asarray(sd, dtype=float)
    return expit(mean), expit(mean - z * sd), expit(mean + z * sd)


@dataclass(frozen=True)
class BinomialHyperparameters:
    """Length scales (unit-cube units) and the latent signal variance (logit units squared)."""

    length_scales: np.ndarray
    signal_variance: float

    @property
    def theta(self) -> np.ndarray:
        return np.log(np.append(self.length_scales, self.signal_variance))

    @classmethod
    def from_theta(cls, theta) -> BinomialHyperparameters:
        theta = np.asarray(theta, dtype=float)
        return cls(np.exp(theta[:-1]), float(math.exp(theta[-1])))

    def to_dict(self) -> dict:
        return {"length_scales": [float(v) for v in self.length_scales],
                "signal_variance": float(self.signal_variance), "likelihood": "binomial"}

    @classmethod
    def from_dict(cls, data) -> BinomialHyperparameters | None:
        """The values of :meth:`to_dict`, or None when ``data`` is not such a dict."""
        try:
            if data.get("likelihood") != "binomial":
                return None
            return cls(np.asarray(data["length_scales"], dtype=float), float(data["signal_variance"]))
        except (AttributeError, KeyError, TypeError, ValueError):
            return None


@dataclass(frozen=True)
class _Mode:
    """The Laplace approximation at the posterior mode (R&W Algorithm 3.1)."""

    g: np.ndarray  # f - m0 at the mode
    grad: np.ndarray  # d log p / d f at the mode
    sW: np.ndarray  # sqrt(W)
    L: np.ndarray  # Cholesky factor of I + sW K sW (lower)
    log_q: float  # approximate log marginal likelihood


def _log_lik(f, k, n, const):
    return float(np.sum(k * log_expit(f) + (n - k) * log_expit(-f)) + const)


def _newton_parts(K, g, m0, k, n):
    p = expit(m0 + g)
    W = n * p * (1.0 - p)
    sW = np.sqrt(W)
    B = np.eye(len(g)) + sW[:, None] * K * sW[None, :]
    L = linalg.cholesky(B, lower=True, check_finite=False)
    return k - n * p, W, sW, L


def laplace_mode(K, m0: float, k, n) -> _Mode:
    """The posterior mode of ``f - m0`` by damped Newton steps (R&W Algorithm 3.1, binomial likelihood)."""
    const = float(np.sum(gammaln(n + 1) - gammaln(k + 1) - gammaln(n - k + 1)))
    a = np.zeros(len(k))
    g = np.zeros(len(k))
    psi = _log_lik(m0 + g, k, n, const)
    for _ in range(NEWTON_MAX_ITER):
        grad, W, sW, L = _newton_parts(K, g, m0, k, n)
        b = W * g + grad
        c = linalg.solve_triangular(L, sW * (K @ b), lower=True, check_finite=False)
        a_new = b - sW * linalg.solve_triangular(L.T, c, lower=False, check_finite=False)
        step = 1.0
        while True:  # halve the step in a until the objective does not fall (R&W section 3.4.3)
            a_try = a + step * (a_new - a)
            g_try = K @ a_try
            psi_try = -0.5 * a_try @ g_try + _log_lik(m0 + g_try, k, n, const)
            if psi_try >= psi - 1e-12 or step < 1e-6:
                break
            step *= 0.5
        done = abs(psi_try - psi) < NEWTON_TOL
        a, g, psi = a_try, g_try, psi_try
        if done:
            break
    grad, _, sW, L = _newton_parts(K, g, m0, k, n)
    log_q = -0.5 * a @ g + _log_lik(m0 + g, k, n, const) - float(np.sum(np.log(np.diag(L))))
    return _Mode(g, grad, sW, L, log_q)


class BinomialGP:
    """A fitted GP on the logit of a rate; immutable. Build one with :func:`fit_binomial_gp`."""

    def __init__(self, X, events, subjects, prior_mean: float, hp: BinomialHyperparameters, *,
                 used_priors: bool = False, message: str = "", cohort_size: int | None = None):
        self.X = X
        #: subjects of a fantasised cohort (the batch); default the runs' median cohort
        self.cohort_size = float(np.median(subjects) if cohort_size is None else cohort_size)
        self.events, self.subjects = events, subjects
        self.y = events / subjects  # the measured rates
        self.prior_mean = float(prior_mean)
        self.hyperparameters = hp
        self.used_priors = used_priors
        self.message = message
        self._K = self._k(X, X)
        self.mode = laplace_mode(self._K, self.prior_mean, events, subjects)
        self.log_marginal_likelihood = self.mode.log_q
        self._lattice_key, self._lattice_value = None, None

    @property
    def n_train(self) -> int:
        return self.X.shape[0]

    @property
    def n_factors(self) -> int:
        return self.X.shape[1]

    def _k(self, X1, X2):
        return matern52(X1, X2, self.hyperparameters.length_scales, self.hyperparameters.signal_variance)

    def _v(self, Ks_T):
        """L^-1 sW k(X, Xs): the part of the latent variance the runs explain."""
        m = self.mode
        return linalg.solve_triangular(m.L, m.sW[:, None] * Ks_T, lower=True, check_finite=False)

    @limited_blas
    def predict(self, Xs, *, include_noise: bool = False, **_):
        """Latent (logit-rate) posterior mean and sd at Xs (R&W Algorithm 3.2).

        There is no measurement noise on the true rate; ``include_noise`` must be False.
        """
        if include_noise:
            raise ValueError("a binomial model predicts the true rate; it has no measurement noise to add")
        Xs = check_points(Xs, self.n_factors)
        Ks = self._k(Xs, self.X)
        mean = self.prior_mean + Ks @ self.mode.grad
        v = self._v(Ks.T)
        sf2 = self.hyperparameters.signal_variance
        var = clip_variance(sf2 - np.einsum("ij,ij->j", v, v), sf2)
        return mean, np.sqrt(np.maximum(var, 0.0))

    def predict_rate(self, Xs):
        """(median, lower 95%, upper 95%) of the true rate at Xs, all in [0, 1]."""
        return rate_band(*self.predict(Xs))

    def posterior_at(self, Xs) -> BinomialPosteriorAt:
        return BinomialPosteriorAt(self, Xs)

    def runs_view(self):
        """(doses tried, unit-scaled; latent mean and sd there; measured rate and subjects there): for a monotone screen.

        Runs at the same point are pooled (their events over their subjects),
        as the trade judges a dose level by all its subjects: two cohorts of
        six at one dose with 1 and 2 events are 3 of 12, not a cohort of 2 of 6.
        """
        X, inverse = np.unique(self.X, axis=0, return_inverse=True)
        inverse = inverse.reshape(-1)
        events = np.bincount(inverse, weights=self.events, minlength=X.shape[0])
        subjects = np.bincount(inverse, weights=self.subjects, minlength=X.shape[0])
        mean, sd = self.predict(X)
        return X, mean, sd, events / subjects, subjects

    def lattice_prediction(self, lattice):
        """Latent mean and sd at a monotone limit's fixed lattice (computed once per lattice)."""
        key = (lattice.shape, lattice.tobytes())
        if self._lattice_key != key:
            self._lattice_value = self.predict(lattice)
            self._lattice_key = key
        return self._lattice_value

    def loo(self) -> RateLeaveOneOut:
        """Approximate leave-one-out predictions of each run's measured rate (cavity of the Laplace sites).

        The Laplace posterior is a GP regression on pseudo-targets
        ``f_i + grad_i / W_i`` with noise ``1 / W_i`` (R&W section 3.4);
        removing site i from the marginal N(f_i, s_i^2) leaves the cavity,
        and the predictive of run i's count mixes Binomial(n_i, expit(f))
        over it (Gauss-Hermite). Intervals are the 2.5% and 97.5% quantiles
        of the count, as rates.
        """
        m = self.mode
        f = self.prior_mean + m.g
        v = self._v(self._K)
        s2 = np.maximum(self.hyperparameters.signal_variance * np.ones(self.n_train) - np.sum(v * v, axis=0),
                        1e-12)
        W = m.sW**2
        tau = np.maximum(1.0 / s2 - W, 1e-12)
        target = f + m.grad / np.maximum(W, 1e-300)
        mu = (f / s2 - W * target) / tau
        return _count_predictive(mu, 1.0 / np.sqrt(tau), self.events, self.subjects)


@dataclass(frozen=True)
class RateLeaveOneOut:
    """Leave-one-out predictions of measured rates: mean, 95% interval, residual, variance (rate units)."""

    mean: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    residual: np.ndarray
    variance: np.ndarray


def _count_predictive(mu, sd, events, subjects) -> RateLeaveOneOut:
    from scipy.stats import binom  # here, not at import: a planning step must not load scipy.stats

    nodes, weights = roots_hermitenorm(QUADRATURE_NODES)
    weights = weights / weights.sum()
    n_runs = len(mu)
    mean, lo, hi, var = (np.zeros(n_runs) for _ in range(4))
    for i in range(n_runs):
        n = int(subjects[i])
        ks = np.arange(n + 1)
        p = expit(mu[i] + sd[i] * nodes)
        pmf = weights @ binom.pmf(ks[None, :], n, p[:, None])
        cdf = np.cumsum(pmf)
        mean[i] = pmf @ ks / n
        var[i] = pmf @ (ks / n - mean[i]) ** 2
        lo[i] = np.searchsorted(cdf, 0.025) / n
        hi[i] = min(np.searchsorted(cdf, 0.975), n) / n
    y = events / subjects
    return RateLeaveOneOut(mean, lo, hi, y - mean, var)


class BinomialPosteriorAt:
    """The latent posterior at fixed points, with rank-one fantasy updates (for the batch).

    A fantasised cohort at point j is a Gaussian pseudo-observation of the
    latent with the Laplace site variance of a cohort (the protocol's
    cohort size, else the runs' median) at that rate, 1 / (n p (1 - p)); the update is the sequential GP
    posterior (R&W eq. 2.24, one point at a time), as for
    :class:`planner.models.gp.PosteriorAt`.
    """

    def __init__(self, model: BinomialGP, Xs):
        self._model = model
        self._Xs = check_points(Xs, model.n_factors)
        self._Ks = model._k(self._Xs, model.X)
        self._V = model._v(self._Ks.T)
        self._mean, sd = model.predict(self._Xs)
        self._var = sd**2
        self._updates: list[np.ndarray] = []
        self._cohort = model.cohort_size

    @property
    def points(self) -> np.ndarray:
        return self._Xs

    def runs_view(self):
        """The fitted model's runs (fantasised cohorts are not runs); see :meth:`BinomialGP.runs_view`."""
        return self._model.runs_view()

    def lattice_prediction(self, lattice):
        """The fitted model's (not the fantasies') prediction at the lattice."""
        return self._model.lattice_prediction(lattice)

    @property
    def n_points(self) -> int:
        return self._Xs.shape[0]

    def mean_sd(self, *, include_noise: bool = False):
        if include_noise:
            raise ValueError("a binomial model predicts the true rate; it has no measurement noise to add")
        return self._mean.copy(), np.sqrt(np.maximum(self._var, 0.0))

    def fantasy_direction(self, p: int = -1) -> np.ndarray:
        """How the latent mean at every point moves per unit of the ``p``-th fantasised cohort's
        standardised surprise: ``c_p / sqrt(s_p)``, as
        :meth:`planner.models.gp.PosteriorAt.fantasy_direction` (latent units)."""
        return self._updates[p]

    def condition(self, j: int, f_j: float) -> None:
        """Add a fantasised cohort whose latent logit rate is ``f_j`` at point j, in place."""
        m = self._model
        c = m._k(self._Xs, self._Xs[j : j + 1])[:, 0] - self._V.T @ self._V[:, j]
        for u in self._updates:
            c -= u * u[j]
        p = float(expit(f_j))
        site_var = 1.0 / (self._cohort * max(p * (1.0 - p), 1e-12))
        s = c[j] + site_var
        u = c / math.sqrt(s)
        self._mean = self._mean + c * (float(f_j) - self._mean[j]) / s
        self._var = self._var - u * u
        self._updates.append(u)


# --------------------------------------------------------------------------- fitting
def _bounds(n_factors: int, length_scale_max: float | None) -> list[tuple[float, float]]:
    hi = LENGTH_SCALE_BOUNDS[1] if length_scale_max is None else min(LENGTH_SCALE_BOUNDS[1], length_scale_max)
    ls = (math.log(LENGTH_SCALE_BOUNDS[0]), math.log(hi))
    sf = tuple(math.log(v) for v in LOGIT_SIGNAL_VARIANCE_BOUNDS)
    return [ls] * n_factors + [sf]


def _log_prior(theta) -> float:
    centre = np.append(np.full(theta.size - 1, LENGTH_SCALE_PRIOR[0]), LOGIT_SIGNAL_VARIANCE_PRIOR[0])
    width = np.append(np.full(theta.size - 1, LENGTH_SCALE_PRIOR[1]), LOGIT_SIGNAL_VARIANCE_PRIOR[1])
    u = (theta - centre) / width
    return float(-0.5 * u @ u)


def _objective(theta, X, k, n, m0, use_priors):
    hp = BinomialHyperparameters.from_theta(theta)
    K = matern52(X, X, hp.length_scales, hp.signal_variance)
    try:
        value = laplace_mode(K, m0, k, n).log_q
    except (linalg.LinAlgError, ValueError):
        return 1e25
    if use_priors:
        value += _log_prior(theta)
    return -value if np.isfinite(value) else 1e25


def _check_counts(X, events, subjects):
    X = np.array(X, dtype=float)
    k, n = np.array(events, dtype=float), np.array(subjects, dtype=float)
    if X.ndim != 2 or X.shape[0] == 0 or k.shape != (X.shape[0],) or n.shape != k.shape:
        raise ModelError("a binomial model needs X of shape (n_runs, n_factors) and one count pair per run")
    if not (np.all(np.isfinite(X)) and np.all(np.isfinite(k)) and np.all(np.isfinite(n))):
        raise ModelError("a binomial model's runs and counts must be finite numbers")
    if np.any(n < 1) or np.any(k < 0) or np.any(k > n):
        raise ModelError("a binomial model needs 0 <= events <= subjects and subjects >= 1 in every run")
    return X, k, n


@limited_blas
def fit_binomial_gp(X, events, subjects, *, prior_mean: float, hyperparameters=None, n_restarts: int = 4,
                    warm_start=None, rng=None, length_scale_max: float | None = None,
                    ml_runs_per_hyperparameter: float = 12.0, cohort_size: int | None = None) -> BinomialGP:
    """Fit a binomial GP: hyperparameters given, or searched (MAP while data are few, as :func:`fit_gp`).

    Parameters
    ----------
    X : array (n_runs, n_factors), unit-scaled.
    events, subjects : arrays (n_runs,) of counts.
    prior_mean : float
        The latent prior mean (the logit of the limit).
    hyperparameters : BinomialHyperparameters, optional
        Fixed: no search.
    length_scale_max : float, optional
        Upper bound of every length scale.
    """
    X, k, n = _check_counts(X, events, subjects)
    d = X.shape[1]
    if hyperparameters is not None:
        return BinomialGP(X, k, n, prior_mean, hyperparameters, message="fixed hyperparameters",
                          cohort_size=cohort_size)
    use_priors = X.shape[0] < ml_runs_per_hyperparameter * (d + 1)
    bounds = _bounds(d, length_scale_max)
    lo, hi = np.array(bounds).T
    gen = np.random.default_rng(rng)
    centre = np.append(np.full(d, LENGTH_SCALE_PRIOR[0]), LOGIT_SIGNAL_VARIANCE_PRIOR[0])
    starts = [np.clip(centre, lo, hi)]
    if warm_start is not None and warm_start.length_scales.size == d:
        starts.insert(0, np.clip(warm_start.theta, lo, hi))
    width = np.append(np.full(d, LENGTH_SCALE_PRIOR[1]), LOGIT_SIGNAL_VARIANCE_PRIOR[1])
    while len(starts) < max(n_restarts, 1):
        starts.append(np.clip(centre + width * gen.standard_normal(d + 1), lo, hi))
    best = None
    for theta0 in starts:
        res = optimize.minimize(_objective, theta0, args=(X, k, n, prior_mean, use_priors), method="L-BFGS-B",
                                bounds=bounds, options={"maxiter": 200})
        if best is None or res.fun < best.fun:
            best = res
    if best is None or not best.fun < 1e24:
        raise ModelError("the binomial model could not be fitted: no hyperparameters gave a finite likelihood")
    hp = BinomialHyperparameters.from_theta(best.x)
    how = "maximum a posteriori (weak priors)" if use_priors else "maximum likelihood"
    return BinomialGP(X, k, n, prior_mean, hp, used_priors=use_priors, cohort_size=cohort_size,
                      message=f"binomial likelihood, Laplace approximation; hyperparameters by {how}")
