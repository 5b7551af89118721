"""A limit model that also answers for the shortest plausible length scales.

With 10 to 30 runs the data rarely pin the length scales down, and the
fitted (MAP or maximum-likelihood) values tend to be long: the smoothest
surface that explains the runs. Between and beyond the runs such a model
can be confidently wrong. On the Gramacy et al. (2016) problem, for
example, the second batch of most campaigns went to x1 = 0, x2 = 0.67,
where the fitted constraint model said -0.2 +/- 0.12 and the truth was
+0.5: the runs did not show the constraint's wiggle there.

The screen therefore also asks a second model of the same response, the
*short* model: the same signal and noise variances, every length scale
multiplied by the smallest factor ``f`` in ``[F_MIN, 1]`` whose log
posterior (log likelihood when the fit used no priors) stays within
``PLAUSIBLE_NATS`` of the fitted one. 1.92 nats is half the 95% point of a
chi-square with one degree of freedom (3.841, standard tables): the usual
profile-likelihood 95% interval for the one multiplier (Wilks' theorem;
trade practice for likelihood intervals). At each point the screen takes
whichever of the two models gives the lower probability of meeting the
limit, so a candidate passes only if it would pass under both.

:class:`PessimisticLimitModel` has the interface of
:class:`planner.models.gp.GaussianProcess` that the planner and the report use;
everything but prediction comes from the fitted model.
"""

from __future__ import annotations

import math

import numpy as np

from guardband.safety.screen import limit_probability

from guardband.planner.errors import ModelError
from guardband.planner.models.gp import GaussianProcess, fit_gp
from guardband.planner.models.hyperparameters import Hyperparameters, log_marginal_likelihood

__all__ = ["PessimisticLimitModel", "shortest_plausible_factor", "PLAUSIBLE_NATS", "F_MIN"]

#: Half the 95% point of chi-square(1): a profile-likelihood 95% interval. The value is
#: 0.5 * scipy.stats.chi2.ppf(0.95, 1), written out so that the command line need not import
#: scipy.stats (its heaviest import); tests/test_startup.py checks it against scipy.stats.
PLAUSIBLE_NATS = 1.920729410347062
#: Smallest length-scale multiplier tried.
F_MIN = 0.2
#: Bisection steps on log f (the factor is found to within 0.2^(1/2^12)).
_BISECTION_STEPS = 12


def _log_target(model: GaussianProcess, theta: np.ndarray, with_prior: bool) -> float:
    z = (model.y - model.prior_mean) / model.scale
    try:
        value, _ = log_marginal_likelihood(model.X, z, theta, include_prior=with_prior)
    except ModelError:  # a matrix that cannot be factorised is not plausible
        return -math.inf
    return float(value) if math.isfinite(value) else -math.inf


def shortest_plausible_factor(model: GaussianProcess, *, with_prior: bool) -> float:
    """The smallest ``f`` in ``[F_MIN, 1]`` with log posterior within PLAUSIBLE_NATS of the fit.

    The signal and noise variances are held; bisection on ``log f``.
    """
    theta = model.hyperparameters.theta
    d = model.n_factors
    base = _log_target(model, theta, with_prior)
    if not math.isfinite(base):
        return 1.0

    def ok(log_f: float) -> bool:
        t = theta.copy()
        t[:d] += log_f
        return _log_target(model, t, with_prior) >= base - PLAUSIBLE_NATS

    lo, hi = math.log(F_MIN), 0.0  # ok(hi) holds
    if ok(lo):
        return F_MIN
    for _ in range(_BISECTION_STEPS):
        mid = 0.5 * (lo + hi)
        if ok(mid):
            hi = mid
        else:
            lo = mid
    return math.exp(hi)


class PessimisticLimitModel:
    """The fitted limit model paired with its short model; predictions take the worse.

    Parameters
    ----------
    fitted : GaussianProcess
        The fitted limit model (after any widening).
    short : GaussianProcess
        The same data with every length scale multiplied by ``factor``.
    factor : float
        The length-scale multiplier of ``short``.
    lower, upper : float or None
        The limit, which decides which prediction is the worse one.
    """

    def __init__(self, fitted: GaussianProcess, short: GaussianProcess, factor: float, lower, upper):
        self.fitted = fitted
        self.short = short
        self.factor = float(factor)
        self.lower = lower
        self.upper = upper

    @classmethod
    def build(cls, fitted: GaussianProcess, *, lower, upper, with_prior: bool) -> PessimisticLimitModel:
        """Find the short model of ``fitted`` and pair the two."""
        f = shortest_plausible_factor(fitted, with_prior=with_prior)
        hp = fitted.hyperparameters
        short_hp = Hyperparameters(hp.length_scales * f, hp.signal_variance, hp.noise_variance)
        short = fit_gp(fitted.X, fitted.y, prior_mean=fitted.prior_mean, hyperparameters=short_hp)
        return cls(fitted, short, f, lower, upper)

    def __getattr__(self, name):  # everything but prediction is the fitted model's
        if name.startswith("__") or name in ("fitted", "short", "factor", "lower", "upper"):
            raise AttributeError(name)  # not yet set (e.g. while unpickling)
        return getattr(self.fitted, name)

    def _worse(self, a, b):
        pa = limit_probability(a[0], a[1], lower=self.lower, upper=self.upper)
        pb = limit_probability(b[0], b[1], lower=self.lower, upper=self.upper)
        take_b = pb < pa
        return np.where(take_b, b[0], a[0]), np.where(take_b, b[1], a[1])

    def predict(self, Xs, *, include_noise: bool = False, **kwargs):
        """Per point, the (mean, sd) of whichever model gives the lower probability of meeting the limit."""
        if kwargs.get("return_cov"):
            raise ValueError("a pessimistic pair has no joint covariance; use its fitted model")
        a = self.fitted.predict(Xs, include_noise=include_noise, **kwargs)
        b = self.short.predict(Xs, include_noise=include_noise, **kwargs)
        return self._worse(a, b)

    def posterior_at(self, Xs) -> _PessimisticPosterior:
        return _PessimisticPosterior(self, self.fitted.posterior_at(Xs), self.short.posterior_at(Xs))


class _PessimisticPosterior:
    """Both models' :class:`planner.models.gp.PosteriorAt`, conditioned together."""

    def __init__(self, pair: PessimisticLimitModel, a, b):
        self._pair, self._a, self._b = pair, a, b

    @property
    def n_points(self) -> int:
        return self._a.n_points

    def mean_sd(self, *, include_noise: bool = False):
        return self._pair._worse(self._a.mean_sd(include_noise=include_noise),
                                 self._b.mean_sd(include_noise=include_noise))

    def condition(self, j: int, y_j: float) -> None:
        self._a.condition(j, y_j)
        self._b.condition(j, y_j)
