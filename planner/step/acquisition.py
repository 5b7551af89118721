"""Ranking rules: expected improvement, probability of improvement,
confidence bound and posterior mean, vectorised over candidates.

Every function takes the posterior ``mean`` and ``sd`` of the objective at
the candidates (arrays of one shape, response units) and, where needed, the
``incumbent``: the best measured objective among runs that met every limit.
``maximize=False`` ranks for a smaller objective, ``maximize=True`` for a
larger one. With ``u`` the improvement over the incumbent (``y* - mu`` when
minimising, ``mu - y*`` when maximising) and ``z = u / sigma``:

* expected improvement, ``EI = u Phi(z) + sigma phi(z)``, and
  ``max(u, 0)`` when ``sigma = 0`` (Jones, Schonlau & Welch 1998);
* probability of improvement, ``PI = Phi((u - xi) / sigma)`` (Kushner 1964);
* confidence bound, ``mu - kappa sigma`` when minimising and
  ``mu + kappa sigma`` when maximising (Srinivas et al. 2010);
* posterior mean, ``mu``.

The registry :data:`RULES` maps the protocol's rule names (``"ei"``,
``"pi"``, ``"bound"``, ``"mean"``) to a :class:`Rule` whose ``score`` is
larger for a better candidate, so that the planner ranks every rule the same
way (``np.argsort(-score(...))``). The score is a strictly increasing
function of the rule's value in the improving direction: ``log EI`` and
``log PI`` (so that candidates deep in the tail, where EI underflows, still
rank), ``-(mu - kappa sigma)`` or ``mu + kappa sigma``, ``-mu`` or ``mu``.

To add a rule, write ``value`` and ``score`` functions with the signature
``f(mean, sd, incumbent, *, maximize, kappa, xi) -> array``, add a
:class:`Rule` to ``_RULES`` below under its name, and add the name to the
protocol's list of ranking rules.

Inputs that cannot come from a valid model (NaN, negative sd, shapes that do
not broadcast) raise ``ValueError``: they are programming errors, not user
mistakes.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from types import MappingProxyType

import numpy as np
from scipy.special import erfcx, log_ndtr, ndtr

__all__ = [
    "expected_improvement",
    "log_expected_improvement",
    "probability_of_improvement",
    "log_probability_of_improvement",
    "confidence_bound",
    "posterior_mean",
    "Rule",
    "RULES",
    "score",
    "all_values",
    "weighted_by_joint",
]

#: Below this z the log of ``phi(z) + z Phi(z)`` uses its asymptotic series.
ASYMPTOTIC_Z = 40.0

_LOG_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)
_SQRT_HALF_PI = math.sqrt(0.5 * math.pi)
_INV_SQRT2 = 1.0 / math.sqrt(2.0)
# (2k+1)!! for the asymptotic series of 1 + z Phi(z)/phi(z), k = 0..6
_SERIES = np.array([1.0, 3.0, 15.0, 105.0, 945.0, 10395.0, 135135.0])


def _phi(z):
    return np.exp(-0.5 * z * z - _LOG_SQRT_2PI)


def _checked(mean, sd, incumbent=0.0):
    """Checked float arrays ``mean``, ``sd``, ``incumbent``, broadcast to one shape."""
    mean = np.asarray(mean, dtype=float)
    sd = np.asarray(sd, dtype=float)
    inc = np.asarray(incumbent, dtype=float)
    if not np.all(np.isfinite(mean)):
        raise ValueError("mean contains NaN or infinite values")
    if not np.all(np.isfinite(sd)) or np.any(sd < 0):
        raise ValueError("sd must be finite and >= 0")
    if not np.all(np.isfinite(inc)):
        raise ValueError(f"incumbent must be finite; got {incumbent!r}")
    try:
        return np.broadcast_arrays(mean, sd, inc)
    except ValueError:
        raise ValueError(f"mean {mean.shape}, sd {sd.shape} and incumbent {inc.shape} do not broadcast") from None


def _improvement(mean, sd, incumbent, maximize):
    """Improvement ``u`` over the incumbent, and ``sd`` (new arrays)."""
    mean, sd, inc = _checked(mean, sd, incumbent)
    u = mean - inc if maximize else inc - mean
    return u, np.array(sd)


def _log_h(z: np.ndarray) -> np.ndarray:
    """``log(phi(z) + z Phi(z))`` for finite or infinite z, stable in the far tail.

    For ``z >= -1`` directly. Below, ``phi(z) + z Phi(z) = phi(z) (1 + z m(z))``
    with the Mills ratio ``m(z) = Phi(z) / phi(z) = sqrt(pi/2) erfcx(-z/sqrt2)``;
    below ``-ASYMPTOTIC_Z``, ``1 + z m(z) = z^-2 sum_k (-1)^k (2k+1)!! z^-2k``
    (asymptotic series, truncation error below 1e-14 there).
    """
    z = np.asarray(z, dtype=float)
    out = np.empty_like(z)
    with np.errstate(over="ignore", under="ignore", divide="ignore", invalid="ignore"):
        top = z >= -1.0
        zt = z[top]
        out[top] = np.where(np.isposinf(zt), np.inf, np.log(zt * ndtr(zt) + _phi(zt)))
        mid = (z < -1.0) & (z >= -ASYMPTOTIC_Z)
        zm = z[mid]
        out[mid] = -0.5 * zm * zm - _LOG_SQRT_2PI + np.log1p(zm * _SQRT_HALF_PI * erfcx(-zm * _INV_SQRT2))
        far = z < -ASYMPTOTIC_Z
        zf = z[far]
        inv2 = 1.0 / (zf * zf)
        signs = (-1.0) ** np.arange(_SERIES.size)
        series = np.polynomial.polynomial.polyval(inv2, signs * _SERIES)
        out[far] = -0.5 * zf * zf - _LOG_SQRT_2PI + np.log(inv2) + np.log(series)
    return out


def expected_improvement(mean, sd, incumbent, *, maximize: bool = False) -> np.ndarray:
    """Expected improvement over the incumbent.

    Parameters
    ----------
    mean, sd : array of shape (n_candidates,)
        Posterior mean and sd of the objective (broadcastable shapes).
    incumbent : float
        Best measured objective among runs that met every limit.
    maximize : bool
        Improve by a larger objective.

    Returns
    -------
    array of shape (n_candidates,)
        Finite and >= 0; ``max(u, 0)`` where ``sd == 0``.
    """
    u, sd = _improvement(mean, sd, incumbent, maximize)
    ei = np.array(np.maximum(u, 0.0))
    pos = sd > 0
    s = sd[pos]
    up = u[pos]
    with np.errstate(over="ignore", divide="ignore"):
        z = up / s
    top = z >= -1.0
    # Jones, Schonlau & Welch (1998): EI = u Phi(z) + sigma phi(z); as written it
    # stays finite when z overflows (sigma tiny), since Phi(inf) = 1, phi(inf) = 0
    out = np.empty_like(z)
    zt = z[top]
    out[top] = np.maximum(up[top] * ndtr(zt) + s[top] * _phi(zt), 0.0)
    # below z = -1: sigma * exp(log(phi(z) + z Phi(z))), without cancellation
    with np.errstate(under="ignore"):
        out[~top] = s[~top] * np.exp(_log_h(z[~top]))
    ei[pos] = out
    return ei


def log_expected_improvement(mean, sd, incumbent, *, maximize: bool = False) -> np.ndarray:
    """Natural log of the expected improvement, accurate in the far tail.

    Parameters and shapes as :func:`expected_improvement`. Returns ``-inf``
    exactly where EI is 0 (``sd == 0`` and no improvement), and a finite
    value wherever EI is positive and its log is representable.
    """
    u, sd = _improvement(mean, sd, incumbent, maximize)
    out = np.full(u.shape, -np.inf)
    zero = sd == 0
    with np.errstate(divide="ignore", over="ignore"):
        out[zero & (u > 0)] = np.log(u[zero & (u > 0)])
        pos = ~zero
        s = sd[pos]
        up = u[pos]
        z = up / s
        vals = np.log(s) + _log_h(z)
    # z overflowed (sigma far below u): EI equals u
    over = np.isposinf(z)
    vals[over] = np.log(up[over])
    out[pos] = vals
    return out


def probability_of_improvement(mean, sd, incumbent, *, xi: float = 0.0, maximize: bool = False) -> np.ndarray:
    """Probability of improving on the incumbent by more than ``xi``.

    ``Phi((u - xi) / sigma)`` (Kushner 1964); where ``sd == 0`` it is 1 if
    ``u > xi`` and 0 otherwise. Parameters as :func:`expected_improvement`;
    ``xi`` is a margin in response units. Returns values in [0, 1].
    """
    u, sd = _improvement(mean, sd, incumbent, maximize)
    xi = _finite(xi, "xi")
    gain = u - xi
    out = np.array(gain > 0, dtype=float)
    pos = sd > 0
    with np.errstate(over="ignore", divide="ignore"):
        out[pos] = ndtr(gain[pos] / sd[pos])
    return out


def log_probability_of_improvement(mean, sd, incumbent, *, xi: float = 0.0, maximize: bool = False) -> np.ndarray:
    """Natural log of :func:`probability_of_improvement`, by ``scipy.special.log_ndtr``."""
    u, sd = _improvement(mean, sd, incumbent, maximize)
    xi = _finite(xi, "xi")
    gain = u - xi
    out = np.array(np.where(gain > 0, 0.0, -np.inf))
    pos = sd > 0
    with np.errstate(over="ignore", divide="ignore"):
        out[pos] = log_ndtr(gain[pos] / sd[pos])
    return out


def confidence_bound(mean, sd, *, kappa: float = 2.0, maximize: bool = False) -> np.ndarray:
    """Optimistic confidence bound (Srinivas et al. 2010).

    ``mean - kappa sd`` (lower bound) when minimising, ``mean + kappa sd``
    (upper bound) when maximising. ``kappa = 1.96`` gives the end of a
    two-sided 95% band. Returns an array of the broadcast shape.
    """
    kappa = _finite(kappa, "kappa")
    if kappa < 0:
        raise ValueError(f"kappa must be >= 0; got {kappa!r}")
    mean, sd, _ = _checked(mean, sd)
    return mean + kappa * sd if maximize else mean - kappa * sd


def posterior_mean(mean, *, maximize: bool = False) -> np.ndarray:
    """The posterior mean itself (a copy); ``maximize`` only matters to the score."""
    mean = np.array(mean, dtype=float)
    if not np.all(np.isfinite(mean)):
        raise ValueError("mean contains NaN or infinite values")
    return mean


def _finite(value, name):
    value = float(value)
    if not math.isfinite(value):
        raise ValueError(f"{name} must be finite; got {value!r}")
    return value


# ---------------------------------------------------------------------------
# Registry


@dataclass(frozen=True)
class Rule:
    """A ranking rule.

    Attributes
    ----------
    name : str
        Protocol name (``"ei"``, ...).
    title : str
        Plain-language name for reports.
    needs_incumbent : bool
        True when the rule compares with the incumbent.
    value : callable
        ``value(mean, sd, incumbent, *, maximize, kappa, xi)``: the rule's value
        in natural units.
    score : callable
        Same signature; larger is better.
    """

    name: str
    title: str
    needs_incumbent: bool
    value: Callable[..., np.ndarray]
    score: Callable[..., np.ndarray]


def _sign(maximize):
    return 1.0 if maximize else -1.0


_RULES = {
    "ei": Rule(
        "ei",
        "expected improvement",
        True,
        value=lambda mean, sd, inc, *, maximize, kappa, xi: expected_improvement(mean, sd, inc, maximize=maximize),
        score=lambda mean, sd, inc, *, maximize, kappa, xi: log_expected_improvement(mean, sd, inc, maximize=maximize),
    ),
    "pi": Rule(
        "pi",
        "probability of improvement",
        True,
        value=lambda mean, sd, inc, *, maximize, kappa, xi: probability_of_improvement(
            mean, sd, inc, xi=xi, maximize=maximize
        ),
        score=lambda mean, sd, inc, *, maximize, kappa, xi: log_probability_of_improvement(
            mean, sd, inc, xi=xi, maximize=maximize
        ),
    ),
    "bound": Rule(
        "bound",
        "confidence bound",
        False,
        value=lambda mean, sd, inc, *, maximize, kappa, xi: confidence_bound(mean, sd, kappa=kappa, maximize=maximize),
        score=lambda mean, sd, inc, *, maximize, kappa, xi: _sign(maximize)
        * confidence_bound(mean, sd, kappa=kappa, maximize=maximize),
    ),
    "mean": Rule(
        "mean",
        "posterior mean",
        False,
        value=lambda mean, sd, inc, *, maximize, kappa, xi: posterior_mean(mean, maximize=maximize),
        score=lambda mean, sd, inc, *, maximize, kappa, xi: _sign(maximize) * posterior_mean(mean, maximize=maximize),
    ),
}

#: Rule name -> :class:`Rule`, read-only.
RULES = MappingProxyType(_RULES)


def _rule(name: str, scale: str = "response") -> Rule:
    """The rule ``name`` on a model's scale: "response" (the mean and sd are the response's), or
    "logit" (a binomial objective: they are the latent logit's, and the rule is the rate's;
    :mod:`.rates`)."""
    if scale == "logit":
        from guardband.planner.step.rates import RATE_RULES

        rules = RATE_RULES
    elif scale == "response":
        rules = RULES
    else:
        raise ValueError(f"unknown model scale {scale!r}; known: response, logit")
    try:
        return rules[name]
    except (KeyError, TypeError):
        raise ValueError(f"unknown ranking rule {name!r}; known rules: {', '.join(RULES)}") from None


def score(
    rule: str,
    mean,
    sd,
    incumbent=None,
    *,
    maximize: bool = False,
    kappa: float = 2.0,
    xi: float = 0.0,
    scale: str = "response",
) -> np.ndarray:
    """Score of each candidate under ``rule``; larger is better.

    Parameters
    ----------
    rule : str
        A key of :data:`RULES`.
    mean, sd : array of shape (n_candidates,)
    incumbent : float, optional
        Needed by ``"ei"`` and ``"pi"``.
    maximize : bool
    kappa : float
        Width of the confidence bound, in sd.
    xi : float
        Margin of the probability of improvement, response units.
    scale : str
        "response", or "logit" for a binomial objective (``mean``, ``sd``
        and ``incumbent`` latent, the rule the rate's; :mod:`.rates`).

    Returns
    -------
    array of shape (n_candidates,)
    """
    r = _rule(rule, scale)
    if r.needs_incumbent and incumbent is None:
        raise ValueError(
            f"rule {rule!r} needs an incumbent (the best objective among runs that met every limit); "
            "with no such run, rank by the joint probability of meeting the limits instead"
        )
    return r.score(mean, sd, incumbent, maximize=maximize, kappa=kappa, xi=xi)


def all_values(
    mean,
    sd,
    incumbent=None,
    *,
    maximize: bool = False,
    kappa: float = 2.0,
    xi: float = 0.0,
    scale: str = "response",
) -> dict[str, np.ndarray]:
    """Every rule's value in natural units, keyed by rule name.

    ``"ei"`` (response units), ``"pi"`` (probability), ``"bound"`` and
    ``"mean"`` (response units), each of shape (n_candidates,). Without an
    incumbent, ``"ei"`` and ``"pi"`` are NaN (there is nothing to improve on).
    With ``scale="logit"`` (a binomial objective) every value is the rate's, in [0, 1].
    """
    out = {}
    for name in RULES:
        r = _rule(name, scale)
        if r.needs_incumbent and incumbent is None:
            shape = np.broadcast_shapes(np.shape(mean), np.shape(sd))
            out[name] = np.full(shape, np.nan)
        else:
            out[name] = r.value(mean, sd, incumbent, maximize=maximize, kappa=kappa, xi=xi)
    return out


def weighted_by_joint(log_score, joint) -> np.ndarray:
    """A rule's log-scale score plus the log of the joint figure: the rule's value times the
    probability of meeting every limit.

    For ``ei`` this is the textbook constrained expected improvement, EI(x)
    times the product of the limits' probabilities (Schonlau, Welch & Jones
    1998; Gardner et al. 2014; from memory), which the simulator's
    ``textbook`` strategy ranks by. The joint figure is floored at the
    smallest normal double, so that a candidate that cannot meet the limits
    ranks last rather than as NaN.

    Parameters
    ----------
    log_score : array_like
        :func:`score` values of a rule whose score is a log (``ei``, ``pi``).
    joint : array_like
        Joint figures in [0, 1], of the same shape.

    Returns
    -------
    ndarray
    """
    joint = np.asarray(joint, dtype=float)
    return np.asarray(log_score, dtype=float) + np.log(np.maximum(joint, np.finfo(float).tiny))
