"""Test problems with known answers, for simulated campaigns.

A problem is a protocol (as a dict, validated by :func:`parse_protocol`)
plus a function that plays the lab: it returns every response for a set of
runs. The protocol supplies the factors, the design space, the objective,
the limits (with their probabilities), the start region and the
problem-specific screen rules (``max_step``, forbidden regions); the
planner's own settings (threshold, ranking, batch) can be replaced by a
user's protocol when simulating (see :mod:`guardband.planner.simulation.strategies`).

Built-in problems
-----------------
``gramacy``
    Gramacy et al. (2016): two factors, two limits, a feasible region
    made of separate pieces.
``tablet``
    Invented: a four-component tablet blend; dissolution is maximised
    while a degradant limit cuts through the best region.
``dose``
    Invented: a two-agent dose study on discrete dose levels; a logistic
    toxicity rate with an upper limit, measured as a binomial count out
    of a cohort when noise is on; a start region of low doses.
``coating``
    Invented: a six-factor coating process whose feasible region (a
    two-sided moisture band inside a defect ellipsoid) is about 4% of the
    box.

How each optimum is known
-------------------------
:func:`locate_optimum` computes it: for continuous factors, a dense
hit-and-run sample of the design space (:meth:`DesignSpace.sample`), then
SLSQP (scipy) from the best feasible samples, keeping the design space's
linear constraints and every limit (with a margin of
:data:`OPTIMUM_MARGIN`, so that the point found is strictly feasible); for
discrete factors only, every feasible level combination is enumerated.
The values stated on each problem (``optimum``, ``optimum_x``) were
obtained this way; ``tests/test_problems.py`` recomputes them and checks
that no point of an independent dense sample beats them.

Adding a problem
----------------
1. Write ``evaluate(X) -> dict`` returning the true (noise-free) value of
   every response of the protocol for runs ``X`` of shape (n, n_factors)
   in protocol units; vectorised; never modify ``X``.
2. Write its protocol dict (factors, limits, screen, ranking, batch).
3. Run ``locate_optimum(problem)`` and put its value and point into the
   :class:`Problem`, with the source and the method used.
4. Add it to :data:`PROBLEMS`; the tests in ``tests/test_problems.py``
   then check it automatically.
"""

from __future__ import annotations

import itertools
import warnings
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
from scipy.optimize import minimize

from guardband.planner.inputs.protocol import Protocol, parse_protocol
from guardband.planner.space.arrays import last_good_point
from guardband.safety.limits import met_every_limit

__all__ = [
    "Problem",
    "OptimumResult",
    "PROBLEMS",
    "get_problem",
    "locate_optimum",
    "objective_range",
    "gramacy_protocol_dict",
    "OPTIMUM_MARGIN",
    "slsqp_in_space",
    "limit_slack",
    "measured",
]

#: Limits are kept this far inside (relative to the response's scale) when
#: polishing an optimum, so that the stated point is strictly feasible.
OPTIMUM_MARGIN = 1e-9


@dataclass(frozen=True)
class Problem:
    """A test problem.

    Attributes
    ----------
    name : str
    source : str
        Where it comes from (a publication, or "invented").
    protocol_dict : dict
        The protocol, before validation.
    evaluate : callable
        ``evaluate(X) -> dict[str, ndarray]``: the true responses for runs X
        of shape (n, n_factors) in protocol units (no noise).
    optimum : float
        The best objective among points that meet every limit.
    optimum_x : tuple of float
        Where it is.
    noise : dict of str to float
        Measurement noise sd per response (Gaussian), at noise scale 1.
    cohort : dict of str to int
        Responses measured as a rate out of a cohort: with noise on, the
        measured value is Binomial(cohort, true rate) / cohort.
    n_start : int
        Suggested starting runs for a simulated campaign.
    budget : int
        Suggested planned runs after the start.
    optimum_method : str
        How the optimum was found.
    tags : dict
        Labels for grouping results (a generated problem's shape class,
        dimension, domain, noise level, ...; see
        :mod:`planner.simulation.family`); empty for the built-in problems.
    """

    name: str
    source: str
    protocol_dict: dict
    evaluate: Callable[[np.ndarray], dict]
    optimum: float
    optimum_x: tuple[float, ...]
    noise: dict
    cohort: dict = field(default_factory=dict)
    n_start: int = 10
    budget: int = 30
    optimum_method: str = ""
    tags: dict = field(default_factory=dict)

    @property
    def protocol(self) -> Protocol:
        return parse_protocol(self.protocol_dict, source=f"problem {self.name}")

    def measure(self, truth: dict, rng: np.random.Generator, *, scale: float = 1.0,
                noise: dict | None = None) -> dict:
        """Measured values: the truth plus noise.

        Parameters
        ----------
        truth : dict of str to array of shape (n,)
            True responses (from :attr:`evaluate`).
        rng : numpy.random.Generator
        scale : float
            Multiplies every Gaussian noise sd; 0 turns all noise off
            (binomial rates too).
        noise : dict of str to float, optional
            Gaussian sd per response, replacing the problem's own (then
            ``scale`` still multiplies them).

        Returns
        -------
        dict of str to array of shape (n,)
            New arrays; ``truth`` is not modified.
        """
        sds = dict(self.noise)
        if noise:
            sds.update(noise)
        return measured(truth, rng, sds, scale=scale, cohort=self.cohort)


def measured(truth: dict, rng: np.random.Generator, sds: dict, *, scale: float = 1.0,
             cohort: dict | None = None) -> dict:
    """Measured values: the truth plus Gaussian noise, or a rate counted out of a cohort.

    Parameters
    ----------
    truth : dict of str to array of shape (n,)
        True responses; measured in the order of the dict.
    rng : numpy.random.Generator
    sds : dict of str to float
        Gaussian noise sd per response; a response without a positive sd
        is measured without noise.
    scale : float
        Multiplies every sd; 0 turns all noise off (binomial rates too).
    cohort : dict of str to int, optional
        Responses measured as Binomial(cohort, true rate) / cohort.

    Returns
    -------
    dict of str to array of shape (n,)
        New arrays; ``truth`` is not modified.
    """
    cohort = cohort or {}
    out = {}
    for r, v in truth.items():
        v = np.asarray(v, dtype=float)
        if scale > 0 and r in cohort:
            m = int(cohort[r])
            out[r] = rng.binomial(m, np.clip(v, 0.0, 1.0)) / m
        elif scale > 0 and sds.get(r, 0.0) > 0:
            out[r] = v + rng.normal(0.0, scale * sds[r], size=v.shape)
        else:
            out[r] = v.copy()
    return out


# ----------------------------------------------------------------- optimum
@dataclass(frozen=True)
class OptimumResult:
    """What :func:`locate_optimum` found.

    Attributes
    ----------
    value : float
    x : ndarray of shape (n_factors,)
    share_feasible : float
        Share of the dense sample (or of the level combinations) meeting every limit.
    n_points : int
        Size of the dense sample or of the enumeration.
    method : str
    objective_range : float
        The objective's range over the sample (or the enumeration) and the
        optimum: the scale a gap is read against.
    """

    value: float
    x: np.ndarray
    share_feasible: float
    n_points: int
    method: str
    objective_range: float = float("nan")


#: Points of the design space drawn for an objective's range when no tag states it.
RANGE_SAMPLE = 4000


def _discrete_grid(space) -> np.ndarray:
    """Every point of an all-discrete design space, shape (n_points, n_factors)."""
    columns = [np.asarray(space.levels[j], float) for j in range(space.n_factors)]
    G = np.array(list(itertools.product(*columns)), dtype=float)
    return G[np.asarray(space.contains(G))]


def slsqp_in_space(space, x0, fun, ineq=None, *, maxiter: int = 200,
                   ftol: float = 1e-10) -> np.ndarray | None:
    """Minimise ``fun(x)`` by SLSQP over the free continuous factors of a design space.

    Parameters
    ----------
    space : DesignSpace
    x0 : array of shape (n_factors,)
        Start (inside the space); fixed and discrete factors keep its values.
    fun : callable
        ``fun(x) -> float`` for a point x of shape (n_factors,).
    ineq : callable, optional
        ``ineq(x) -> array``; every entry must end >= 0.
    maxiter, ftol : SLSQP options.

    Returns
    -------
    ndarray of shape (n_factors,) or None
        The result, when it is finite and inside the space (the bounds,
        equalities and inequalities of the space are kept as constraints);
        None otherwise. ``x0`` is not modified.
    """
    x0 = np.array(x0, dtype=float)
    free = np.asarray(space.free).copy()
    for j in getattr(space, "levels", {}):
        free[j] = False
    if not np.any(free):
        return None
    rest = x0.copy()

    def full(z):
        x = rest.copy()
        x[free] = z
        return x

    cons = []
    if ineq is not None:
        cons.append({"type": "ineq", "fun": lambda z: np.atleast_1d(ineq(full(z)))})
    if space.A_ub.shape[0]:
        A, b = space.A_ub[:, free], space.b_ub - space.A_ub[:, ~free] @ rest[~free]
        cons.append({"type": "ineq", "fun": lambda z, A=A, b=b: b - A @ z, "jac": lambda z, A=A: -A})
    if space.A_eq.shape[0]:
        A, b = space.A_eq[:, free], space.b_eq - space.A_eq[:, ~free] @ rest[~free]
        cons.append({"type": "eq", "fun": lambda z, A=A, b=b: A @ z - b, "jac": lambda z, A=A: A})
    lo, hi = space.lower[free], space.upper[free]
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = minimize(lambda z: fun(full(z)), x0[free], method="SLSQP",
                           bounds=list(zip(lo, hi)), constraints=cons,
                           options={"maxiter": maxiter, "ftol": ftol})
    except (ValueError, np.linalg.LinAlgError):
        return None
    x = full(np.clip(res.x, lo, hi))
    if not np.all(np.isfinite(x)) or not bool(np.asarray(space.contains(x[None, :]))[0]):
        return None
    return x


def limit_slack(protocol: Protocol, values: dict, *, margin: dict | None = None) -> np.ndarray:
    """How far one point is inside each bound of every limit: SLSQP's inequality constraints.

    Parameters
    ----------
    protocol : Protocol
    values : dict of str to float
        Each limited response's value at the point.
    margin : dict of str to float, optional
        Distance each limit must be kept inside, per response.

    Returns
    -------
    ndarray of shape (n_bounds,)
        ``upper - margin - value`` and ``value - lower - margin`` for every
        bound, limit by limit; every entry is >= 0 when the point meets
        every limit.
    """
    out = []
    for lim in protocol.limits:
        m = margin[lim.name] if margin else 0.0
        v = values[lim.name]
        if lim.upper is not None:
            out.append(lim.upper - m - v)
        if lim.lower is not None:
            out.append(v - lim.lower - m)
    return np.array(out)


def _pulled_back(protocol: Protocol, evaluate, start: np.ndarray, x: np.ndarray) -> np.ndarray:
    """``x`` if it meets every limit; else the feasible point nearest it on the segment from ``start``.

    SLSQP can stop a hair outside a limit (a failed line search at the
    boundary); :func:`~guardband.planner.space.arrays.last_good_point` finds
    the last point of the segment from a start that meets every limit that
    still does. The segment lies in the design space (a convex polytope
    holding both ends).
    """
    return last_good_point(lambda z: bool(met_every_limit(protocol, evaluate(z[None, :]))[0]), start, x)


def _best_of_each_combination(X: np.ndarray, order: np.ndarray, columns: list[int]) -> list[int]:
    """The first index in ``order`` of each combination of the values of ``columns`` (best first)."""
    _, first = np.unique(X[np.ix_(order, columns)], axis=0, return_index=True)
    return [int(i) for i in order[np.sort(first)]]


def locate_optimum(problem: Problem, *, n_samples: int = 200_000, n_polish: int = 20,
                   seed: int = 0) -> OptimumResult:
    """The best objective among points meeting every limit.

    Parameters
    ----------
    problem : Problem
    n_samples : int
        Dense sample size (continuous factors).
    n_polish : int
        Best feasible samples (and spread-out feasible samples, as many)
        polished by SLSQP.
    seed : int

    Returns
    -------
    OptimumResult

    Notes
    -----
    With discrete factors only, every feasible level combination is
    evaluated (exact). Otherwise the design space is sampled densely by
    hit-and-run, and SLSQP polishes the best feasible points over the free
    factors with the space's bounds, equalities and inequalities and each
    limit kept ``OPTIMUM_MARGIN`` (times the response's sampled spread)
    inside. With discrete and continuous factors together, the sample holds
    feasible level combinations, each polish keeps its start's levels, and
    the best sample of each combination met is polished too (up to
    ``n_polish`` combinations, best first), so that no combination is judged
    by its sample alone.
    """
    protocol = problem.protocol
    space = protocol.design_space()
    obj = protocol.objective.name
    sign = -1.0 if protocol.maximize else 1.0
    if space.levels and len(space.levels) == space.n_factors:
        G = _discrete_grid(space)
        Y = problem.evaluate(G)
        ok = met_every_limit(protocol, Y)
        if not np.any(ok):
            raise ValueError(f"problem {problem.name!r}: no level combination meets every limit")
        idx = np.flatnonzero(ok)
        best = idx[np.argmin(sign * Y[obj][idx])]
        return OptimumResult(float(Y[obj][best]), G[best].copy(), float(ok.mean()), G.shape[0],
                             "enumeration of every feasible level combination", _spread(Y[obj]))
    rng = np.random.default_rng(seed)
    X = space.sample(n_samples, rng=rng)
    Y = problem.evaluate(X)
    ok = met_every_limit(protocol, Y)
    if not np.any(ok):
        raise ValueError(f"problem {problem.name!r}: no sampled point meets every limit")
    scale = {lim.name: max(float(np.ptp(Y[lim.name])), 1e-12) for lim in protocol.limits}
    idx = np.flatnonzero(ok)
    order = idx[np.argsort(sign * Y[obj][idx])]
    starts = list(order[:n_polish])
    starts += list(rng.choice(idx, size=min(n_polish, idx.size), replace=False))
    if space.levels:
        starts += _best_of_each_combination(X, order, sorted(space.levels))[:n_polish]
    best_x, best_v = X[order[0]].copy(), float(sign * Y[obj][order[0]])

    # the objective in units of its sampled spread: SLSQP's tolerances then mean the same on
    # every problem (a response in % and factors in fractions left its line search stranded)
    spread = max(float(np.ptp(Y[obj][idx])), 1e-12)

    def f(x):
        return sign * float(problem.evaluate(x[None, :])[obj][0]) / spread

    margin = {name: OPTIMUM_MARGIN * s for name, s in scale.items()}

    def g(x):  # every limit, OPTIMUM_MARGIN inside; >= 0 when met
        y = problem.evaluate(x[None, :])
        return limit_slack(protocol, {lim.name: float(y[lim.name][0]) for lim in protocol.limits},
                           margin=margin)

    for i in starts:
        x = slsqp_in_space(space, X[i], f, g, maxiter=300, ftol=1e-12)
        if x is None:
            continue
        x = _pulled_back(protocol, problem.evaluate, X[i], x)
        y = problem.evaluate(x[None, :])
        if met_every_limit(protocol, y)[0] and sign * float(y[obj][0]) < best_v:
            best_x, best_v = x, sign * float(y[obj][0])
    method = f"dense hit-and-run sample of {n_samples} points, then SLSQP from {len(starts)} feasible starts"
    on_grid = _best_on_grid(problem, X[idx], best_x)
    if on_grid is not None:
        best_x, best_v = on_grid[0], sign * on_grid[1]
        method += ("; on the factors' resolution grid: the best of the rounded feasible samples and the "
                   "grid points within two steps of the optimum's rounding")
    return OptimumResult(float(sign * best_v), best_x, float(ok.mean()), int(n_samples), method,
                         _spread(Y[obj], sign * best_v))


def _best_on_grid(problem: Problem, X_ok: np.ndarray, x_best: np.ndarray) -> tuple[np.ndarray, float] | None:
    """With resolutions, (point, value) of the best grid point inside the space that meets every
    limit, among the rounded feasible samples and the grid points within two steps of the rounding
    of ``x_best``: every planned run is rounded, so a gap is measured from a point the lab can set.
    None without resolutions (or when no such grid point is found)."""
    from guardband.planner.space.rounding import rounding_of

    protocol = problem.protocol
    rnd = rounding_of(protocol)
    if not rnd.any:
        return None
    near = rnd.neighbours(x_best)
    G = np.unique(np.vstack([rnd.round(X_ok), *[rnd.neighbours(x) for x in near]]), axis=0)
    G = G[protocol.design_space().contains(G)]
    Y = problem.evaluate(G)
    ok = np.flatnonzero(met_every_limit(protocol, Y))
    if ok.size == 0:
        return None
    y = Y[protocol.objective.name][ok]
    best = ok[np.argmax(y) if protocol.maximize else np.argmin(y)]
    return G[best].copy(), float(Y[protocol.objective.name][best])


def _spread(y, *extra) -> float:
    """``ptp`` of the values (and any extra ones), at least 1e-12."""
    return float(max(np.ptp(np.append(np.asarray(y, dtype=float), extra)), 1e-12))


def objective_range(problem: Problem) -> float:
    """The objective's range over the design space: the problem's tag, else a seeded sample.

    Generated problems and scenario truths carry it as ``tags["objective_range"]``
    (from :func:`locate_optimum`); otherwise :data:`RANGE_SAMPLE` points of the
    design space are drawn with seed 0, the known optimum included.
    """
    if "objective_range" in problem.tags:
        return float(problem.tags["objective_range"])
    protocol = problem.protocol
    X = protocol.design_space().sample(RANGE_SAMPLE, rng=np.random.default_rng(0))
    return _spread(problem.evaluate(X)[protocol.objective.name], problem.optimum)


# ------------------------------------------------------------ Gramacy 2016
def gramacy_protocol_dict(*, batch: int = 3, rule: str = "ei", threshold: float = 0.9,
                          probability: float = 0.95) -> dict:
    """Protocol for the Gramacy et al. (2016) toy problem."""
    return {
        "seed": 1,
        "study": {"title": "Gramacy et al. (2016) constrained toy problem", "version": "1",
                  "author": "test", "kind": "formulation"},
        "factors": [
            {"name": "x1", "kind": "continuous", "lower": 0.0, "upper": 1.0},
            {"name": "x2", "kind": "continuous", "lower": 0.0, "upper": 1.0},
        ],
        "objective": {"name": "f", "direction": "minimize"},
        "limits": [
            {"name": "c1", "upper": 0.0, "probability": probability},
            {"name": "c2", "upper": 0.0, "probability": probability},
        ],
        "screen": {"threshold": threshold, "joint": "bound", "min_runs": 5},
        "ranking": {"rule": rule},
        "batch": {"size": batch, "pool": 2000, "refine": 3},
        "model": {"restarts": 3},
    }


def _gramacy(X: np.ndarray) -> dict:
    X = np.asarray(X, dtype=float)
    x1, x2 = X[:, 0], X[:, 1]
    return {
        "f": x1 + x2,
        "c1": 1.5 - x1 - 2.0 * x2 - 0.5 * np.sin(2.0 * np.pi * (x1**2 - 2.0 * x2)),
        "c2": x1**2 + x2**2 - 1.5,
    }


GRAMACY = Problem(
    name="gramacy",
    source=("Gramacy et al. (2016), Technometrics 58(1):1-11 (citation published; "
            "optimum about 0.5998 at about (0.1954, 0.4044) from memory)"),
    protocol_dict=gramacy_protocol_dict(threshold=0.95),
    evaluate=_gramacy,
    # locate_optimum(GRAMACY): agrees with the value from memory to 1e-4
    optimum=0.5997880550600124,
    optimum_x=(0.1951226875576432, 0.40466536750236926),
    noise={"f": 0.0, "c1": 0.0, "c2": 0.0},
    n_start=10,
    budget=30,
    optimum_method="dense sample + SLSQP (locate_optimum)",
)


# ------------------------------------------------- invented: tablet blend
def tablet_protocol_dict() -> dict:
    """Protocol of the invented four-component tablet-blend problem."""
    return {
        "seed": 2,
        "study": {"title": "Tablet blend with a degradant limit (invented test problem)",
                  "version": "1", "author": "test", "kind": "formulation"},
        "mixture": {"total": 1.0},
        "factors": [
            {"name": "filler", "kind": "component", "lower": 0.40, "upper": 0.85, "unit": "fraction"},
            {"name": "binder", "kind": "component", "lower": 0.05, "upper": 0.30, "unit": "fraction"},
            {"name": "disintegrant", "kind": "component", "lower": 0.02, "upper": 0.15, "unit": "fraction"},
            {"name": "surfactant", "kind": "component", "lower": 0.0, "upper": 0.08, "unit": "fraction"},
        ],
        "objective": {"name": "dissolution", "direction": "maximize", "unit": "% released"},
        "limits": [
            {"name": "degradant", "upper": 0.2, "probability": 0.95, "unit": "% of label",
             "source": "example: ICH Q3B(R2) identification threshold 0.2% (>10 mg to 2 g daily dose)"},
        ],
        "screen": {"threshold": 0.95, "joint": "bound", "min_runs": 5},
        "ranking": {"rule": "ei"},
        "batch": {"size": 3, "pool": 2000, "refine": 3},
        "model": {"restarts": 3},
    }


def _softplus(k: np.ndarray) -> np.ndarray:
    return np.logaddexp(0.0, k)


def _tablet(X: np.ndarray) -> dict:
    X = np.asarray(X, dtype=float)
    f, b, d, s = X[:, 0], X[:, 1], X[:, 2], X[:, 3]
    # first-order release; disintegrant helps up to about 9% (then gels),
    # surfactant helps (more so in a filler-rich blend), binder slows it
    k = 0.3 + 8.0 * d + 12.0 * s - 2.0 * b - 150.0 * (d - 0.09) ** 2 + 10.0 * f * s
    dissolution = 100.0 * (1.0 - np.exp(-_softplus(k)))
    # the surfactant carries a reactive impurity; binder moisture speeds the
    # reaction; a steep rise near the top of the surfactant range
    degradant = 0.03 + 2.0 * s * (0.5 + 2.0 * b) + 0.6 * b * d + 0.3 * np.exp(20.0 * (s - 0.08))
    return {"dissolution": dissolution, "degradant": degradant}


TABLET = Problem(
    name="tablet",
    source="invented (a four-component blend; the degradant limit crosses the best region)",
    protocol_dict=tablet_protocol_dict(),
    evaluate=_tablet,
    # locate_optimum(TABLET); on the degradant limit (0.2)
    optimum=85.07003798944412,
    optimum_x=(0.7993522089557376, 0.05, 0.11494200985062106, 0.035705781243357416),
    noise={"dissolution": 1.0, "degradant": 0.005},
    n_start=10,
    budget=30,
    optimum_method="dense sample + SLSQP (locate_optimum)",
)


# ------------------------------------------------- invented: dose study
DOSE_A_LEVELS = (0.0, 2.5, 5.0, 7.5, 10.0, 15.0, 20.0, 25.0, 30.0, 40.0, 50.0, 60.0, 80.0)
DOSE_B_LEVELS = (0.0, 0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 5.0, 6.0, 8.0)


def dose_protocol_dict() -> dict:
    """Protocol of the invented two-agent dose-study problem."""
    return {
        "seed": 3,
        "study": {"title": "Two-agent dose study (invented test problem)", "version": "1",
                  "author": "test", "kind": "dose"},
        "factors": [
            {"name": "dose_a", "kind": "discrete", "levels": list(DOSE_A_LEVELS), "unit": "mg/kg"},
            {"name": "dose_b", "kind": "discrete", "levels": list(DOSE_B_LEVELS), "unit": "mg/kg"},
        ],
        "constraints": [{"name": "combined exposure cap", "rule": "dose_a / 80 + dose_b / 8 <= 1.5"}],
        "objective": {"name": "response", "direction": "maximize", "unit": "score"},
        "limits": [
            # judged on the true rate, as overdose control in dose escalation does
            # (Babb, Rogatko & Zacks 1998, Statistics in Medicine 17:1103-1120; from
            # memory): a cohort of 6 is too coarse a measurement to be 95% sure of
            {"name": "tox_rate", "upper": 0.25, "probability": 0.95, "unit": "fraction of cohort",
             "source": "example: a target toxicity rate of 25% (Conaway & Wages)",
             "judged_on": "true-value"},
        ],
        # escalate cautiously: at most 0.1 (unit-scaled, per sqrt(factor)) from a
        # dose combination that met the limit; with 0.2 the toxicity model,
        # fitted to flat low-dose rates, promised safety it could not keep
        "screen": {"threshold": 0.95, "joint": "bound", "min_runs": 4, "max_step": 0.1},
        "start": {"rules": ["dose_a <= 10", "dose_b <= 1"], "note": "low doses cleared for a start"},
        "ranking": {"rule": "ei"},
        "batch": {"size": 2, "pool": 2000, "refine": 0},
        "model": {"restarts": 3},
    }


#: Cohort size of the dose problem (a toxicity rate is a count out of it).
DOSE_COHORT = 6


def _dose(X: np.ndarray) -> dict:
    X = np.asarray(X, dtype=float)
    a, b = X[:, 0], X[:, 1]
    # logistic toxicity rate, nearly additive on the logit scale
    eta = -3.8 + 0.05 * a + 0.35 * b + 0.004 * a * b
    tox = 1.0 / (1.0 + np.exp(-eta))
    # Emax response in each agent plus a synergy term
    response = 40.0 * a / (a + 15.0) + 25.0 * b / (b + 1.5) + 50.0 * a * b / (a * b + 60.0)
    return {"response": response, "tox_rate": tox}


DOSE = Problem(
    name="dose",
    source="invented (logistic toxicity rate and Emax response in two agents on discrete levels)",
    protocol_dict=dose_protocol_dict(),
    evaluate=_dose,
    # locate_optimum(DOSE), exact; toxicity rate there about 0.231
    optimum=69.44444444444446,
    optimum_x=(25.0, 3.0),
    noise={"response": 3.0, "tox_rate": 0.0},
    cohort={"tox_rate": DOSE_COHORT},
    n_start=4,
    budget=20,
    optimum_method="enumeration of every feasible level combination (locate_optimum)",
)


# --------------------------------------------- invented: coating process
_COAT_BOUNDS = (
    ("inlet_temp", 40.0, 80.0, "degC"),
    ("spray_rate", 5.0, 25.0, "g/min"),
    ("atomizing_air", 1.0, 3.0, "bar"),
    ("pan_speed", 4.0, 16.0, "rpm"),
    ("coat_level", 2.0, 8.0, "% weight gain"),
    ("plasticizer", 5.0, 25.0, "% of polymer"),
)
_COAT_LO = np.array([b[1] for b in _COAT_BOUNDS])
_COAT_SPAN = np.array([b[2] - b[1] for b in _COAT_BOUNDS])
_COAT_CENTRE = np.array([0.45, 0.55, 0.5, 0.5, 0.5, 0.5])
_COAT_WEIGHT = np.array([1.0, 1.0, 1.5, 0.8, 1.2, 0.6])


def coating_protocol_dict() -> dict:
    """Protocol of the invented six-factor coating problem."""
    return {
        "seed": 4,
        "study": {"title": "Film coating with a narrow workable region (invented test problem)",
                  "version": "1", "author": "test", "kind": "formulation"},
        "factors": [{"name": n, "kind": "continuous", "lower": lo, "upper": hi, "unit": u}
                    for n, lo, hi, u in _COAT_BOUNDS],
        # the measurement sds are the assays' known repeatability (the problem's noise below)
        "objective": {"name": "release_cv", "direction": "minimize", "unit": "%", "measurement_sd": 0.05},
        "limits": [
            {"name": "moisture", "lower": 2.2, "upper": 2.8, "probability": 0.95, "unit": "% w/w",
             "measurement_sd": 0.02},
            {"name": "defects", "upper": 1.5, "probability": 0.95, "unit": "% of tablets",
             "measurement_sd": 0.05},
        ],
        "screen": {"threshold": 0.95, "joint": "bound", "min_runs": 5},
        "ranking": {"rule": "ei"},
        "batch": {"size": 3, "pool": 3000, "refine": 3},
        "model": {"restarts": 3},
    }


def _coating(X: np.ndarray) -> dict:
    U = (np.asarray(X, dtype=float) - _COAT_LO) / _COAT_SPAN
    u1, u2, u3, u4, u5, u6 = U.T
    # moisture left in the film: up with spray rate, down with inlet
    # temperature and atomizing air
    m = 0.9 * u2 - 0.8 * u1 + 0.3 * u2 * u4 - 0.3 * u3 + 0.2 * u5**2
    moisture = 2.5 + 2.0 * m
    # defects (twinning, orange peel, picking) away from a workable centre
    defects = 0.3 + 4.0 * np.sum(_COAT_WEIGHT * (U - _COAT_CENTRE) ** 2, axis=1) + 0.5 * u3 * u6
    release_cv = (3.0 + 4.0 * (u5 - 0.9) ** 2 + 3.0 * (u6 - 0.85) ** 2 + 2.5 * (u1 - 0.2) ** 2
                  + 1.5 * np.exp(-2.0 * u4) + 1.0 * u3 * (1.0 - u2))
    return {"release_cv": release_cv, "moisture": moisture, "defects": defects}


COATING = Problem(
    name="coating",
    source="invented (six process factors; the feasible region is about 4% of the box)",
    protocol_dict=coating_protocol_dict(),
    evaluate=_coating,
    # locate_optimum(COATING); moisture at its upper limit, defects at theirs
    optimum=3.685310202244362,
    optimum_x=(54.31470206242947, 12.48324127755217, 1.7127121176787632, 13.340311611441505,
               6.629831920420017, 20.457837221725708),
    noise={"release_cv": 0.05, "moisture": 0.02, "defects": 0.05},
    n_start=15,
    budget=45,
    optimum_method="dense sample + SLSQP (locate_optimum)",
)

PROBLEMS: dict[str, Problem] = {p.name: p for p in (GRAMACY, TABLET, DOSE, COATING)}


def get_problem(name: str) -> Problem:
    """A built-in problem by name (ValueError listing the names otherwise)."""
    try:
        return PROBLEMS[name]
    except KeyError:
        raise ValueError(f"unknown problem {name!r}; built-in problems: {', '.join(sorted(PROBLEMS))}") from None
