"""A binomial objective (a rate of events among subjects): its rules, incumbent and figures on the rate.

The objective's model (:mod:`guardband.planner.models.binomial`) gives the
latent logit of the rate at a candidate as a Gaussian, f ~ N(mu, sd^2);
the rate is R = expit(f). The planner keeps mu and sd on the latent scale
(the batch's fantasies and the incumbent live there too) and every rule is
a figure of the *rate*, computed from that Gaussian:

* expected improvement, E[max(R - r*, 0)] when maximising (E[max(r* - R, 0)]
  when minimising), with r* = expit(m*) the incumbent's rate: a
  one-dimensional integral over the tail f > logit r* of a smooth
  integrand, by Gauss-Legendre quadrature (128 nodes), summed as logs so
  that the far tail never underflows;
* probability of improvement, P(R > r* + xi) = Phi((mu - logit(r* + xi)) / sd)
  (xi in rate units), exact because expit is increasing; 0 when r* + xi >= 1;
* confidence bound, expit(mu +- kappa sd): the same quantile of the rate
  as of the latent, exact for the same reason;
* posterior mean, E[R] by Gauss-Hermite quadrature (the mean of a
  logit-normal has no closed form).

All values lie in [0, 1] (the expected improvement in [0, 1 - r*]). The
scores rank as the values do, without ties where the values saturate
(the bound and the mean are ranked by their latent counterparts, which
are increasing functions of them). ``tests/test_rate_objective.py`` checks
every rule against scipy's adaptive quadrature and against Monte Carlo.

The incumbent is the run with the best observed rate (events over
subjects) among runs that met every limit; of runs with equal rates, the
one with more subjects, then the first in the file. The rules compare with
the model's latent mean at that run, m* (the fitted rate, not the raw
count), so one responder out of one subject (100%) is not taken to mean
that nothing can improve on it: the model weighs a cohort by its size.
"""

from __future__ import annotations

from functools import lru_cache
from types import MappingProxyType

import numpy as np
from scipy.special import expit, log_expit, log_ndtr, logsumexp, ndtr, ndtri, roots_hermitenorm

from guardband.planner.settings import Z95
from guardband.planner.step.result import Mode

__all__ = ["LOGIT", "objective_scale", "rate_expected_improvement", "log_rate_expected_improvement",
           "rate_probability_of_improvement", "log_rate_probability_of_improvement", "rate_bound",
           "rate_moments", "RATE_RULES", "objective_band", "rate_incumbent", "rate_outcome_figures",
           "QUADRATURE_NODES"]

#: The scale name of a binomial objective's model (mean and sd of the logit of its rate).
LOGIT = "logit"
#: Nodes of the Gauss-Hermite quadrature of the mean rate.
QUADRATURE_NODES = 64
#: Nodes of the Gauss-Legendre quadrature of the expected improvement, and the span (in latent sd)
#: it integrates over on either side of the incumbent.
EI_NODES = 128
EI_Z_SPAN = 10.0
_LOG_SQRT_2PI = 0.5 * np.log(2.0 * np.pi)


@lru_cache(maxsize=1)
def _legendre():
    x, w = np.polynomial.legendre.leggauss(EI_NODES)
    return (x + 1.0) / 2.0, np.log(w / 2.0)  # nodes on (0, 1), log weights


@lru_cache(maxsize=1)
def _hermite():
    z, w = roots_hermitenorm(QUADRATURE_NODES)
    return z, np.log(w / w.sum())


def objective_scale(protocol) -> dict:
    """The ranking keywords a protocol's objective adds: ``{"scale": "logit"}`` for a binomial one, else none."""
    return {"scale": LOGIT} if protocol.objective.kind == "binomial" else {}


def _arrays(mean, sd, incumbent=0.0):
    mean, sd, inc = (np.asarray(v, dtype=float) for v in (mean, sd, incumbent))
    if not (np.all(np.isfinite(mean)) and np.all(np.isfinite(sd)) and np.all(sd >= 0)):
        raise ValueError("mean must be finite and sd finite and >= 0")
    if not np.all(np.isfinite(inc)):
        raise ValueError(f"the incumbent's latent value must be finite; got {incumbent!r}")
    return np.broadcast_arrays(mean, sd, inc)


def _log_gain(f, l):
    """log(expit(f) - expit(l)) for f > l, without cancellation: expit(f) expit(-l) (1 - e^(l - f))."""
    with np.errstate(divide="ignore"):
        return log_expit(f) + log_expit(-l) + np.log(-np.expm1(l - f))


def log_rate_expected_improvement(mean, sd, incumbent, *, maximize: bool = False) -> np.ndarray:
    """log E[max(+-(expit(f) - expit(incumbent)), 0)] for f ~ N(mean, sd^2); -inf where it is 0.

    ``incumbent`` is the incumbent's latent value m*. Minimising is
    maximising the rate of non-events: r* - R = expit(-f) - expit(-m*).
    With z = (f - mean) / sd and a = (m* - mean) / sd, the integral of
    gain(mean + sd z) phi(z) over z > a by Gauss-Legendre on
    [max(a, -EI_Z_SPAN), max(a, 0) + span], span = EI_Z_SPAN, or 4 EI_Z_SPAN / a
    when a > 4 (the normal's tail beyond is below e^-40 of its value at
    a); the integrand is smooth there, and summed as logs it never underflows.
    """
    mean, sd, l = _arrays(mean, sd, incumbent)
    if not maximize:
        mean, l = -mean, -l
    out = np.full(mean.shape, -np.inf)
    zero = sd == 0
    up = zero & (mean > l)
    out[up] = _log_gain(mean[up], l[up])
    pos = ~zero
    m, s, lp = mean[pos], sd[pos], l[pos]
    a = (lp - m) / s
    z_lo = np.maximum(a, -EI_Z_SPAN)
    z_hi = np.maximum(a, 0.0) + np.where(a < 4.0, EI_Z_SPAN, 4.0 * EI_Z_SPAN / np.maximum(a, 4.0))
    x, log_w = _legendre()
    z = z_lo[:, None] + (z_hi - z_lo)[:, None] * x[None, :]
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = (log_w[None, :] + _log_gain(m[:, None] + s[:, None] * z, lp[:, None])
                 - 0.5 * z * z - _LOG_SQRT_2PI)
    out[pos] = np.log(z_hi - z_lo) + logsumexp(terms, axis=1)
    return out


def rate_expected_improvement(mean, sd, incumbent, *, maximize: bool = False) -> np.ndarray:
    """E[max(+-(R - r*), 0)], rate units; see :func:`log_rate_expected_improvement`."""
    return np.exp(log_rate_expected_improvement(mean, sd, incumbent, maximize=maximize))


def _pi_edge(incumbent, xi, maximize):
    """The latent value a rate must pass to improve by more than xi: logit(r* +- xi), +-inf past [0, 1]."""
    target = expit(incumbent) + (xi if maximize else -xi)
    with np.errstate(divide="ignore"):
        return np.where(target >= 1.0, np.inf, np.where(target <= 0.0, -np.inf,
                                                         np.log(target) - np.log1p(-np.clip(target, 0, 1))))


def log_rate_probability_of_improvement(mean, sd, incumbent, *, xi: float = 0.0,
                                        maximize: bool = False) -> np.ndarray:
    """log P(R improves on r* by more than xi) = log Phi(+-(mean - logit(r* +- xi)) / sd)."""
    mean, sd, inc = _arrays(mean, sd, incumbent)
    edge = _pi_edge(inc, float(xi), maximize)
    gain = mean - edge if maximize else edge - mean
    out = np.where(gain > 0, 0.0, -np.inf)
    pos = sd > 0
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        out[pos] = log_ndtr(gain[pos] / sd[pos])
    return out


def rate_probability_of_improvement(mean, sd, incumbent, *, xi: float = 0.0, maximize: bool = False) -> np.ndarray:
    """P(R improves on r* by more than xi), in [0, 1]."""
    return np.exp(log_rate_probability_of_improvement(mean, sd, incumbent, xi=xi, maximize=maximize))


def _latent_bound(mean, sd, kappa, maximize):
    kappa = float(kappa)
    if not (np.isfinite(kappa) and kappa >= 0):
        raise ValueError(f"kappa must be finite and >= 0; got {kappa!r}")
    mean, sd, _ = _arrays(mean, sd)
    return mean + kappa * sd if maximize else mean - kappa * sd


def rate_bound(mean, sd, *, kappa: float = 2.0, maximize: bool = False) -> np.ndarray:
    """expit(mean +- kappa sd): the optimistic end of the rate's interval (its quantile at Phi(+-kappa))."""
    return expit(_latent_bound(mean, sd, kappa, maximize))


def _log_mean_rate(mean, sd):
    """log E[expit(f)] for f ~ N(mean, sd^2), by Gauss-Hermite quadrature."""
    z, log_w = _hermite()
    return logsumexp(log_w[None, :] + log_expit(mean[:, None] + sd[:, None] * z[None, :]), axis=1)


def rate_moments(mean, sd):
    """(E[R], sd of R) of R = expit(f), f ~ N(mean, sd^2), by Gauss-Hermite quadrature; arrays in [0, 1]."""
    mean, sd, _ = _arrays(np.atleast_1d(mean), np.atleast_1d(sd))
    z, log_w = _hermite()
    r = expit(mean[:, None] + sd[:, None] * z[None, :])
    w = np.exp(log_w)
    m = r @ w
    return m, np.sqrt(np.maximum(((r - m[:, None]) ** 2) @ w, 0.0))


def _mean_value(mean, sd, inc, *, maximize, kappa, xi):
    mean, sd, _ = _arrays(np.atleast_1d(mean), np.atleast_1d(sd))
    return np.exp(_log_mean_rate(mean, sd))


def _mean_score(mean, sd, inc, *, maximize, kappa, xi):
    """The logit of E[R], log E[R] - log E[1 - R] (its sign flipped when minimising): increasing in
    E[R] and without ties where E[R] is within rounding of 0 or 1."""
    mean, sd, _ = _arrays(np.atleast_1d(mean), np.atleast_1d(sd))
    log_odds = _log_mean_rate(mean, sd) - _log_mean_rate(-mean, sd)
    return log_odds if maximize else -log_odds


def _rate_rules():
    from guardband.planner.step.acquisition import Rule  # here: acquisition imports this module lazily

    return MappingProxyType({
        "ei": Rule("ei", "expected improvement of the rate", True,
                   value=lambda m, s, inc, *, maximize, kappa, xi: rate_expected_improvement(m, s, inc, maximize=maximize),
                   score=lambda m, s, inc, *, maximize, kappa, xi: log_rate_expected_improvement(
                       m, s, inc, maximize=maximize)),
        "pi": Rule("pi", "probability that the rate improves", True,
                   value=lambda m, s, inc, *, maximize, kappa, xi: rate_probability_of_improvement(
                       m, s, inc, xi=xi, maximize=maximize),
                   score=lambda m, s, inc, *, maximize, kappa, xi: log_rate_probability_of_improvement(
                       m, s, inc, xi=xi, maximize=maximize)),
        "bound": Rule("bound", "confidence bound of the rate", False,
                      value=lambda m, s, inc, *, maximize, kappa, xi: rate_bound(m, s, kappa=kappa, maximize=maximize),
                      score=lambda m, s, inc, *, maximize, kappa, xi: (1.0 if maximize else -1.0)
                      * _latent_bound(m, s, kappa, maximize)),
        "mean": Rule("mean", "posterior mean of the rate", False, value=_mean_value, score=_mean_score),
    })


class _LazyRules:
    """RATE_RULES, built on first use (the Rule class lives in :mod:`.acquisition`)."""

    def __getitem__(self, name):
        return _built()[name]

    def __iter__(self):
        return iter(_built())

    def items(self):
        return _built().items()


@lru_cache(maxsize=1)
def _built():
    return _rate_rules()


#: Rule name -> :class:`~guardband.planner.step.acquisition.Rule` on the rate scale (mean and sd latent).
RATE_RULES = _LazyRules()


def objective_band(mean, sd, scale: str | None = None):
    """(mean, sd, lower 95%, upper 95%) of the objective as shown: response units, or for a
    binomial objective (``scale="logit"``) the rate's mean and sd (quadrature) and its central
    95% interval expit(mean -+ 1.96 sd), all in [0, 1]. Arrays of the input's shape."""
    mean, sd = np.asarray(mean, dtype=float), np.asarray(sd, dtype=float)
    if scale != LOGIT:
        return mean, sd, mean - Z95 * sd, mean + Z95 * sd
    m, s = rate_moments(mean.reshape(-1), sd.reshape(-1))
    return m.reshape(mean.shape), s.reshape(mean.shape), expit(mean - Z95 * sd), expit(mean + Z95 * sd)


def rate_incumbent(protocol, runs, safe, model, U_runs) -> tuple[dict | None, str, list[str]]:
    """The incumbent of a binomial objective: the best observed rate among runs that met every limit.

    Equal rates: the run with more subjects, then the first in the file.
    Returns (incumbent, mode, messages) as the planning step's incumbent:
    ``value`` is the observed rate (events / subjects), ``events`` and
    ``subjects`` its counts, ``latent`` the model's latent mean at the run
    (what the rules compare with) and ``model_rate`` its expit. ``U_runs``:
    the runs' unit-scaled factors, as the model takes them.
    """
    name = protocol.objective.name
    rate = runs.Y[name]
    cand = safe & np.isfinite(rate)
    if not np.any(cand):
        return None, Mode.FEASIBILITY_FIRST, [
            "no run so far meets every limit: ranking by the joint figure to find a safe, "
            "feasible region first (feasibility first)"]
    events, subjects = runs.counts[name]
    idx = np.flatnonzero(cand)
    signed = rate[idx] if protocol.maximize else -rate[idx]
    best = int(idx[np.lexsort((idx, -subjects[idx], -signed))[0]])
    latent = float(model.predict(U_runs[best:best + 1])[0][0])
    inc = {"run_id": runs.run_ids[best], "value": float(rate[best]), "events": int(events[best]),
           "subjects": int(subjects[best]), "latent": latent, "model_rate": float(expit(latent))}
    note = (f"the incumbent {runs.run_ids[best]} had {int(events[best])} of {int(subjects[best])} "
            f"({rate[best]:.3g}); the rules compare with the model's rate there, {expit(latent):.3g}, "
            "which weighs the cohort by its size")
    return inc, Mode.IMPROVE, [note]


def rate_outcome_figures(mean, sd, incumbent, *, maximize: bool) -> dict:
    """What the true rate R = expit(f), f ~ N(mean, sd^2), looks like against the incumbent's latent m*.

    As :func:`guardband.planner.step.attitudes.outcome_figures`, on the rate:
    ``mean``/``sd`` (quadrature), ``lo95``/``hi95`` and ``q05``/``q95``
    (quantiles, exact), ``p_better``/``p_worse``, ``ei`` and ``shortfall``
    (expected gain and loss against r* = expit(m*)); plus ``latent_mean``
    and ``latent_sd`` for drawing the rate's density.
    """
    mean, sd = np.atleast_1d(np.asarray(mean, dtype=float)), np.atleast_1d(np.asarray(sd, dtype=float))
    m, s = rate_moments(mean, sd)
    out = {"mean": m, "sd": s, "lo95": expit(mean - Z95 * sd), "hi95": expit(mean + Z95 * sd),
           "q05": expit(mean + ndtri(0.05) * sd), "q95": expit(mean + ndtri(0.95) * sd),
           "latent_mean": mean, "latent_sd": sd}
    if incumbent is None:
        nan = np.full(mean.shape, np.nan)
        return {**out, "p_better": nan, "p_worse": nan, "ei": nan, "shortfall": nan}
    with np.errstate(divide="ignore", invalid="ignore"):
        above = np.where(sd > 0, ndtr((mean - incumbent) / np.where(sd > 0, sd, 1.0)), (mean > incumbent) * 1.0)
    out["p_better"] = above if maximize else 1.0 - above
    out["p_worse"] = 1.0 - out["p_better"]
    out["ei"] = rate_expected_improvement(mean, sd, incumbent, maximize=maximize)
    out["shortfall"] = rate_expected_improvement(mean, sd, incumbent, maximize=not maximize)
    return out


def limit_rate_bands(result) -> dict:
    """Each binomial limit's predicted true rate at the proposals: name -> (median, lower 95%, upper 95%)
    arrays in [0, 1] from its fitted model (the model's own band; the screen's probability may be lower,
    held down by the monotone envelope), or None when the limit has no model (it vouches for nothing)."""
    X = np.array([q.x for q in result.proposals], dtype=float).reshape(-1, len(result.factor_names))
    out = {}
    for lim in result.protocol.limits:
        if lim.kind != "binomial":
            continue
        model = result.fitted.get(lim.name)
        out[lim.name] = None if model is None or not X.shape[0] else model.predict_rate(result.unit(X))
    return out
