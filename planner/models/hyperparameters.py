"""The kernel hyperparameters: their type, priors, bounds and search.

The hyperparameters ``l`` (one length scale per factor), ``sf2`` (signal
variance) and ``sn2`` (noise variance) are in standardised units (see
:mod:`planner.models.gp` for the model); in response units the signal and
noise variances are ``s^2 sf2`` and ``s^2 sn2``. The search works on
``theta = log [l_1 .. l_d, sf2, sn2]``: L-BFGS-B on the log marginal
likelihood, plus the log prior when the priors apply, from several starts.

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
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from scipy import linalg, optimize

from guardband.planner.errors import ModelError
from guardband.planner.models.blas import limited_blas
from guardband.planner.models.arrays import check_data
from guardband.planner.models.kernel import (
    SQRT5,
    NotPositiveDefinite,
    Pairwise,
    cholesky_with_jitter,
    matern_from_sr,
    not_pd_advice,
)

__all__ = [
    "Hyperparameters",
    "as_hyperparameters",
    "log_marginal_likelihood",
    "log_prior_and_gradient",
    "search_hyperparameters",
    "NOISE_FLOOR",
    "LENGTH_SCALE_PRIOR",
    "SIGNAL_VARIANCE_PRIOR",
    "NOISE_VARIANCE_PRIOR",
    "LENGTH_SCALE_BOUNDS",
    "NOISE_VARIANCE_MAX",
    "ML_RUNS_PER_HYPERPARAMETER",
    "AGREEMENT_NATS",
    "SUBSET_FROM_RUNS",
    "SUBSET_MIN_RUNS",
    "LOG_2PI",
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

LOG_2PI = math.log(2.0 * math.pi)


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


def as_hyperparameters(value, n_factors: int, name: str) -> Hyperparameters:
    """``value`` (Hyperparameters or their dict) checked against ``n_factors``; ``name`` goes in the message."""
    hp = value if isinstance(value, Hyperparameters) else Hyperparameters.from_dict(value)
    if hp.n_factors != n_factors:
        raise ModelError(
            f"{name} has {hp.n_factors} length scales but X has {n_factors} factors; "
            "pass values fitted on the same factors"
        )
    return hp


# ---------------------------------------------------------------------------
# Priors and the log marginal likelihood


def _prior_arrays(n_factors: int):
    centre = np.array([LENGTH_SCALE_PRIOR[0]] * n_factors + [SIGNAL_VARIANCE_PRIOR[0], NOISE_VARIANCE_PRIOR[0]])
    width = np.array([LENGTH_SCALE_PRIOR[1]] * n_factors + [SIGNAL_VARIANCE_PRIOR[1], NOISE_VARIANCE_PRIOR[1]])
    return centre, width


def log_prior_and_gradient(theta: np.ndarray):
    """Log density of the independent normal priors on theta, and its gradient."""
    centre, width = _prior_arrays(theta.size - 2)
    u = (theta - centre) / width
    value = float(-0.5 * u @ u - np.sum(np.log(width)) - 0.5 * theta.size * LOG_2PI)
    return value, -u / width


def _lml_and_gradient(pairs: Pairwise, z: np.ndarray, theta: np.ndarray):
    """Log marginal likelihood of ``z`` and its gradient in theta.

    Rasmussen & Williams (2006), eq. 2.30 and 5.9 (numbers from memory): with
    ``W = alpha alpha^T - K^-1``, ``d lml / d theta_j = 0.5 sum_ij W_ij dK_ij / d theta_j``,
    taken as elementwise sums; W and dK are symmetric, so a sum is twice the
    sum over the pairs below the diagonal plus the diagonal. For the Matérn
    5/2 kernel ``dK / d log l_k = 5/3 sf2 (1 + sqrt5 r) exp(-sqrt5 r) (x_ik - x_jk)^2 / l_k^2``
    (zero on the diagonal). Raises ``NotPositiveDefinite``.
    """
    n = z.size
    d = theta.size - 2
    ls = np.exp(theta[:d])
    sf2 = math.exp(theta[d])
    sn2 = math.exp(theta[d + 1])
    inv_l2 = 1.0 / (ls * ls)
    sr = np.sqrt(pairs.r2(inv_l2))
    sr *= SQRT5
    e = np.exp(-sr)
    kc = matern_from_sr(sr, sf2, e)  # the pairs below the diagonal
    Ky = np.zeros((n, n))  # LAPACK reads the lower triangle only
    Ky.flat[pairs.flat] = kc
    Ky.flat[:: n + 1] = sf2 + sn2
    L, _ = cholesky_with_jitter(Ky)
    alpha = linalg.cho_solve((L, True), z, check_finite=False)
    lml = float(-0.5 * z @ alpha - np.sum(np.log(np.diag(L))) - 0.5 * n * LOG_2PI)
    inv, info = linalg.lapack.dpotri(L, lower=1)  # lower triangle of K^-1
    if info != 0:
        raise NotPositiveDefinite(f"dpotri info {info}")
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


@limited_blas
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
    X, z = check_data(X, z)
    theta = np.asarray(theta, dtype=float)
    if theta.shape != (X.shape[1] + 2,):
        raise ModelError(f"theta must have shape ({X.shape[1] + 2},) for {X.shape[1]} factors; got {theta.shape}")
    try:
        value, grad = _lml_and_gradient(Pairwise(X), z, theta)
    except NotPositiveDefinite:
        raise ModelError(not_pd_advice(X.shape[0])) from None
    if include_prior:
        lp, glp = log_prior_and_gradient(theta)
        value, grad = value + lp, grad + glp
    return value, grad


# ---------------------------------------------------------------------------
# The search


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
    pairs = Pairwise(X)

    def objective(theta):
        try:
            value, grad = _lml_and_gradient(pairs, z, theta)
        except NotPositiveDefinite:
            # back off: L-BFGS-B's line search shortens the step
            return math.inf, np.zeros_like(theta)
        if use_priors:
            lp, glp = log_prior_and_gradient(theta)
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


def search_hyperparameters(X, z, warm_start, n_restarts, rng, noise_floor, use_priors=True,
                           length_scale_max=None, fixed_noise=None):
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
        raise ModelError("the hyperparameter search failed from every start: " + not_pd_advice(n))
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
