"""Simulated campaigns: what a protocol's choices cost and risk, before any lab work.

The lab is replaced by a test problem with known answers
(:mod:`planner.problems`), with optional measurement noise. Several
strategies spend the same budget on the same problem, over many seeds,
and the report says how good, and how safe, each one was.

How the settings combine
------------------------
The *problem's* protocol supplies the world: factors, mixture and linear
constraints, objective, limits with their probabilities and ``min_runs``,
the start region, ``max_step`` and forbidden regions. The *settings*
protocol (the user's, e.g. ``protocols/tablet_blend.toml``) supplies how
the planner searches and screens: ``screen.threshold``, ``screen.joint``,
``screen.short_model``, ``screen.widen_from_loo``, ``ranking`` (rule,
kappa, xi), ``batch.size``, ``batch.pool``, ``batch.refine`` and the
``model`` table (restarts, the priors rule, the limit models'
length-scale cap). The measurement sds belong to the world (the problem's
assays). Without a settings protocol the problem's own values are used.

Strategies (:data:`STRATEGIES`)
-------------------------------
``protocol``
    The combined protocol as it is.
``ei``, ``pi``, ``bound``, ``mean``
    The same, with that ranking rule.
``random``
    The same starting runs, then the budget spent on points drawn
    uniformly from the design space (:meth:`DesignSpace.sample`); no
    start region, step rule or forbidden region.
``classical``
    A space-filling design (:func:`planner.designs.maximin`) of
    ``n_start + budget - 1`` runs over the whole design space, a quadratic
    model fitted by least squares to every response (Scheffé's canonical
    quadratic without intercept for mixture components, Scheffé 1958, from
    memory; the full quadratic otherwise), and one confirmation run at the
    best point of the fitted objective that meets the fitted limits (a
    large sampled pool, then SLSQP). Same total number of runs as the
    others.
``screen-off``
    The ``protocol`` strategy with the probability screen switched off:
    the joint threshold and every limit's probability set to
    :data:`SCREEN_OFF` (and the joint figure computed as a product, since
    the bound max(0, 1 - sum(1 - p_i)) is 0 for two limits at tiny p_i).
    The hard rules (design space, ``max_step``, forbidden regions) stay.

Planner strategies whose combined protocols are equal (e.g. ``protocol``
and ``ei`` when the protocol ranks by EI) are run once and reported under
both names.

What is reported
----------------
For every strategy and every planned-run count k = 0..budget (runs after
the first ``n_start``, the same for every strategy), over seeds: the best
measured objective among runs whose measured responses met every limit
(the lab's view), the gap to the known optimum (positive is worse; no safe
run counts as an infinite gap) and the share of planned runs that broke a
limit by the true responses; medians and quartiles. For the planner
strategies, the mean joint figure promised by the screen against the
observed share of planned runs that met every limit (calibration).

Seeds run in parallel worker processes, each with one BLAS thread; a
serial run (``workers=1``) uses one BLAS thread as well, so both give the
same numbers.
"""

from __future__ import annotations

import functools
import math
import multiprocessing
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from guardband.planner.simulation.loop import CampaignHistory, best_so_far, run_campaign, start_runs
from guardband.planner.space.designs import maximin
from guardband.planner.app.fileio import write_csv_text
from guardband.planner.models import blas_limit, default_workers, hold_blas_limit
from guardband.planner.simulation.problems import PROBLEMS, Problem, get_problem, slsqp_in_space
from guardband.planner.inputs.protocol import RANKING_RULES, Protocol, load_protocol, parse_protocol
from guardband.planner.step.plan import within_limit
from guardband.planner.app.textable import render_table

__all__ = [
    "STRATEGIES",
    "PLANNER_STRATEGIES",
    "SCREEN_OFF",
    "CLASSICAL_POOL",
    "SIMULATION_CAUTION",
    "QuadraticModel",
    "fit_quadratic",
    "combine_settings",
    "strategy_protocol",
    "parse_noise",
    "run_random",
    "run_classical",
    "SimulationResult",
    "simulate",
    "OptionError",
    "simulate_from_options",
]

STRATEGIES = ("protocol", "ei", "pi", "bound", "mean", "random", "classical", "screen-off")
PLANNER_STRATEGIES = ("protocol",) + RANKING_RULES + ("screen-off",)
#: Threshold and limit probability of the ``screen-off`` strategy.
SCREEN_OFF = 1e-9
#: Sampled pool of the classical route's search for its fitted best point.
CLASSICAL_POOL = 20000
#: Points of the classical route's pool polished by SLSQP.
CLASSICAL_POLISH = 5
#: Quantiles reported over seeds.
QUARTILES = (0.25, 0.5, 0.75)
SIMULATION_CAUTION = (
    "Simulated against a test problem with known answers: a real study's responses, noise "
    "and model fit differ, so these figures show tendencies, not guarantees."
)


# ------------------------------------------------------------- settings
def combine_settings(problem: Problem, settings: Protocol | None) -> Protocol:
    """The problem's protocol with the planner settings of ``settings``.

    Parameters
    ----------
    problem : Problem
    settings : Protocol or None
        Supplies screen.threshold, screen.joint, screen.short_model,
        screen.widen_from_loo, ranking, batch.size, batch.pool,
        batch.refine and the model settings (restarts, the priors rule,
        the limit models' length-scale cap); None keeps the problem's own.

    Returns
    -------
    Protocol
    """
    data = problem.protocol.model_dump(mode="python")
    if settings is not None:
        data["screen"]["threshold"] = settings.screen.threshold
        data["screen"]["joint"] = settings.screen.joint
        data["screen"]["short_model"] = settings.screen.short_model
        data["screen"]["widen_from_loo"] = settings.screen.widen_from_loo
        data["ranking"] = settings.ranking.model_dump(mode="python")
        for key in ("size", "pool", "refine"):
            data["batch"][key] = getattr(settings.batch, key)
        data["model"] = settings.model.model_dump(mode="python")
    return parse_protocol(data, source=f"problem {problem.name} with settings")


def strategy_protocol(protocol: Protocol, strategy: str) -> Protocol | None:
    """The protocol a planner strategy runs with (None for random and classical)."""
    _check_strategy(strategy)
    if strategy in ("random", "classical"):
        return None
    if strategy == "protocol":
        return protocol
    data = protocol.model_dump(mode="python")
    if strategy == "screen-off":
        data["screen"]["threshold"] = SCREEN_OFF
        data["screen"]["joint"] = "independent"
        for lim in data["limits"]:
            lim["probability"] = SCREEN_OFF
    else:
        data["ranking"]["rule"] = strategy
    return parse_protocol(data, source=f"strategy {strategy}")


def _check_strategy(strategy: str) -> None:
    if strategy not in STRATEGIES:
        raise ValueError(f"unknown strategy {strategy!r}; strategies: {', '.join(STRATEGIES)}")


def parse_noise(values, problem: Problem) -> tuple[float, dict]:
    """Read ``--noise`` values: a scale (``1`` = the problem's noise, ``0`` = none) or ``NAME=SD``.

    Parameters
    ----------
    values : sequence of str
    problem : Problem

    Returns
    -------
    (scale, sds) : (float, dict of str to float)
        With only ``NAME=SD`` entries the scale is 1 and the other
        responses keep the problem's noise.

    Raises
    ------
    ValueError
        With a sentence saying what is wrong.
    """
    scale, sds = None, {}
    names = problem.protocol.response_names
    for text in values or ():
        text = str(text).strip()
        if "=" in text:
            name, _, value = text.partition("=")
            name = name.strip()
            if name not in names:
                raise ValueError(f"--noise {text!r}: {name!r} is not a response of problem "
                                 f"{problem.name!r} (responses: {', '.join(names)})")
            sd = _nonnegative(value, text)
            sds[name] = sd
        else:
            if scale is not None:
                raise ValueError(f"--noise {text!r}: give one scale only")
            scale = _nonnegative(text, text)
    if scale is None:
        scale = 1.0 if sds else 0.0
    return scale, sds


def _nonnegative(value: str, text: str) -> float:
    try:
        v = float(value)
    except ValueError:
        raise ValueError(f"--noise {text!r}: {value.strip()!r} is not a number") from None
    if not math.isfinite(v) or v < 0:
        raise ValueError(f"--noise {text!r}: must be a finite number >= 0")
    return v


# ---------------------------------------------------- quadratic models
@dataclass(frozen=True)
class QuadraticModel:
    """A quadratic response-surface model fitted by least squares.

    Attributes
    ----------
    terms : tuple of str
        Readable names of the model terms.
    coef : ndarray of shape (n_terms,)
    kind : str
        "scheffe" (mixture, no intercept) or "full".
    rank : int
        Rank of the design matrix (below ``len(terms)`` when the runs cannot
        separate every term; the minimum-norm solution is used then).
    """

    terms: tuple[str, ...]
    coef: np.ndarray
    kind: str
    rank: int
    _basis: object = field(repr=False, compare=False)

    def predict(self, X) -> np.ndarray:
        """Predictions for points X of shape (n, n_factors); returns shape (n,)."""
        return self._basis(np.atleast_2d(np.asarray(X, dtype=float))) @ self.coef


def _quadratic_basis(space, names):
    """Design-matrix function and term names for a quadratic model over the free factors."""
    free = np.flatnonzero(np.asarray(space.free))
    comps = [j for j in free if j in set(_components(space))]
    others = [j for j in free if j not in comps]
    r = space.check().ranges
    lo = r[:, 0]
    w = np.where(r[:, 1] - r[:, 0] > 0, r[:, 1] - r[:, 0], 1.0)
    if len(comps) >= 2:
        total = next(t for idx, t in _mixture_totals(space) if set(comps) <= set(idx))
        terms = [names[i] for i in comps]
        terms += [f"{names[i]}*{names[j]}" for a, i in enumerate(comps) for j in comps[a + 1:]]
        terms += [f"{names[i]}*{names[k]}" for i in comps for k in others]
        terms += [f"{names[k]}^2" for k in others]
        terms += [f"{names[k]}*{names[m]}" for a, k in enumerate(others) for m in others[a + 1:]]

        def basis(X):
            P = X[:, comps] / total
            Z = (X[:, others] - lo[others]) / w[others]
            cols = [P]
            cols += [P[:, a:a + 1] * P[:, a + 1:] for a in range(len(comps) - 1)]
            cols += [P[:, a:a + 1] * Z for a in range(len(comps))]
            cols += [Z**2]
            cols += [Z[:, a:a + 1] * Z[:, a + 1:] for a in range(len(others) - 1)]
            return np.hstack([c.reshape(X.shape[0], -1) for c in cols])

        return basis, tuple(terms), "scheffe"
    terms = ["1"] + [names[k] for k in free] + [f"{names[k]}^2" for k in free]
    terms += [f"{names[k]}*{names[m]}" for a, k in enumerate(free) for m in free[a + 1:]]

    def basis(X):
        Z = (X[:, free] - lo[free]) / w[free]
        cols = [np.ones((X.shape[0], 1)), Z, Z**2]
        cols += [Z[:, a:a + 1] * Z[:, a + 1:] for a in range(len(free) - 1)]
        return np.hstack([c.reshape(X.shape[0], -1) for c in cols])

    return basis, tuple(terms), "full"


def _mixture_totals(space):
    from guardband.planner.space.designs import mixture_rows

    return mixture_rows(space)


def _components(space) -> list[int]:
    rows = _mixture_totals(space)
    return sorted({int(j) for idx, _ in rows for j in idx})


def fit_quadratic(X, y, space) -> QuadraticModel:
    """Fit a quadratic model to one response by least squares.

    Parameters
    ----------
    X : array of shape (n_runs, n_factors)
        Runs in protocol units.
    y : array of shape (n_runs,)
    space : DesignSpace
        Says which factors are free and which are mixture components.

    Returns
    -------
    QuadraticModel
        Scheffé's canonical quadratic (no intercept) over the free mixture
        components, with component-by-factor products and squares and
        products of the other free factors (unit-scaled); or the full
        quadratic in the unit-scaled free factors when there is no mixture.
    """
    X = np.asarray(X, dtype=float)
    y = np.asarray(y, dtype=float)
    basis, terms, kind = _quadratic_basis(space, space.names)
    F = basis(X)
    ok = np.isfinite(y)
    coef, _, rank, _ = np.linalg.lstsq(F[ok], y[ok], rcond=None)
    return QuadraticModel(terms, coef, kind, int(rank), basis)


def _violation(protocol, preds: dict, scale: dict) -> np.ndarray:
    """Sum over limits of how far predictions fall outside (scaled), 0 when inside."""
    n = len(preds[protocol.objective.name])
    v = np.zeros(n)
    for lim in protocol.limits:
        p = preds[lim.name]
        if lim.upper is not None:
            v += np.maximum(p - lim.upper, 0.0) / scale[lim.name]
        if lim.lower is not None:
            v += np.maximum(lim.lower - p, 0.0) / scale[lim.name]
    return v


def classical_point(models: dict, protocol: Protocol, *, rng, pool_size: int = CLASSICAL_POOL,
                    scale: dict | None = None) -> np.ndarray:
    """The best point of the fitted objective that meets the fitted limits.

    Parameters
    ----------
    models : dict of str to QuadraticModel
        One per response.
    protocol : Protocol
    rng : numpy.random.Generator
    pool_size : int
    scale : dict of str to float, optional
        Spread of each limited response (for ranking violations when no
        pool point meets the fitted limits).

    Returns
    -------
    ndarray of shape (n_factors,)
        Inside the design space. When no pool point meets every fitted
        limit, the one that misses them by least.
    """
    space = protocol.design_space()
    pool = space.sample(pool_size, rng=rng)
    preds = {r: m.predict(pool) for r, m in models.items()}
    scale = scale or {lim.name: 1.0 for lim in protocol.limits}
    viol = _violation(protocol, preds, scale)
    sign = -1.0 if protocol.maximize else 1.0
    obj = sign * preds[protocol.objective.name]
    if not np.any(viol == 0.0):
        return pool[int(np.argmin(viol))].copy()
    idx = np.flatnonzero(viol == 0.0)
    order = idx[np.argsort(obj[idx], kind="stable")]
    best_x, best_v = pool[order[0]].copy(), float(obj[order[0]])
    obj_model = models[protocol.objective.name]

    def f(x):
        return sign * float(obj_model.predict(x)[0])

    def g(x):
        out = []
        for lim in protocol.limits:
            p = float(models[lim.name].predict(x)[0])
            if lim.upper is not None:
                out.append(lim.upper - p)
            if lim.lower is not None:
                out.append(p - lim.lower)
        return np.array(out) if out else np.zeros(1)

    for i in order[:CLASSICAL_POLISH]:
        x = slsqp_in_space(space, pool[i], f, g if protocol.limits else None)
        if x is None:
            continue
        p = {r: m.predict(x) for r, m in models.items()}
        if _violation(protocol, p, scale)[0] <= 1e-9 and f(x) < best_v:
            best_x, best_v = x, f(x)
    return best_x


# ------------------------------------------------------ the strategies
def _broke(protocol: Protocol, truth: dict) -> np.ndarray:
    n = len(truth[protocol.objective.name])
    ok = np.ones(n, dtype=bool)
    for lim in protocol.limits:
        ok &= within_limit(np.asarray(truth[lim.name], float), lim)
    return ~ok


def _history(protocol, X, T, Y, n_start, *, promised=None, stalled=False, modes=(), message=""):
    n = X.shape[0]
    planned = np.arange(n) >= n_start
    return CampaignHistory(
        X=X, Y=Y, planned=planned, broke_limit=_broke(protocol, T),
        best_safe=best_so_far(protocol, Y),
        promised=np.full(n, np.nan) if promised is None else promised,
        stalled=stalled, T=T, modes=tuple(modes), message=message,
    )


def _lab(problem, protocol, measure, rng, X):
    truth = problem.evaluate(X)
    T = {r: np.asarray(truth[r], dtype=float) for r in protocol.response_names}
    return T, measure(T, rng)


def run_random(problem: Problem, protocol: Protocol, *, X_start, budget: int, seed: int,
               measure) -> CampaignHistory:
    """The starting runs, then ``budget`` runs drawn uniformly from the design space.

    Parameters
    ----------
    problem : Problem
    protocol : Protocol
    X_start : array of shape (n_start, n_factors)
    budget : int
    seed : int
    measure : callable
        ``measure(truth, rng) -> dict``.

    Returns
    -------
    CampaignHistory
    """
    rng = np.random.default_rng(seed)
    X0 = np.array(X_start, dtype=float)
    T0, Y0 = _lab(problem, protocol, measure, rng, X0)
    X1 = protocol.design_space().sample(budget, rng=rng)
    T1, Y1 = _lab(problem, protocol, measure, rng, X1)
    X = np.vstack([X0, X1])
    T = {r: np.concatenate([T0[r], T1[r]]) for r in T0}
    Y = {r: np.concatenate([Y0[r], Y1[r]]) for r in Y0}
    return _history(protocol, X, T, Y, X0.shape[0])


def run_classical(problem: Problem, protocol: Protocol, *, n_runs: int, n_start: int, seed: int,
                  measure, pool_size: int = CLASSICAL_POOL) -> CampaignHistory:
    """The classical route: a space-filling design, quadratic fits, one confirmation run.

    Parameters
    ----------
    problem : Problem
    protocol : Protocol
    n_runs : int
        All runs, the confirmation run included (``n_start + budget``).
    n_start : int
        Runs counted as the start (for the planned-run count only).
    seed : int
    measure : callable
    pool_size : int
        Pool of the maximin design and of the search for the fitted best point.

    Returns
    -------
    CampaignHistory
        ``message`` names the fitted model kind.
    """
    rng = np.random.default_rng(seed)
    space = protocol.design_space()
    Xd = maximin(space, n_runs - 1, rng=rng, pool_size=max(pool_size, n_runs))
    Td, Yd = _lab(problem, protocol, measure, rng, Xd)
    models = {r: fit_quadratic(Xd, Yd[r], space) for r in protocol.response_names}
    scale = {lim.name: max(float(np.nanstd(Yd[lim.name])), 1e-12) for lim in protocol.limits}
    x = classical_point(models, protocol, rng=rng, pool_size=pool_size, scale=scale)
    Tc, Yc = _lab(problem, protocol, measure, rng, x[None, :])
    X = np.vstack([Xd, x[None, :]])
    T = {r: np.concatenate([Td[r], Tc[r]]) for r in Td}
    Y = {r: np.concatenate([Yd[r], Yc[r]]) for r in Yd}
    kind = next(iter(models.values())).kind
    return _history(protocol, X, T, Y, n_start,
                    message=f"quadratic models ({kind}); confirmation run at the fitted best point")


# ----------------------------------------------------------- the tasks
@dataclass(frozen=True)
class _Task:
    key: str  # the strategy whose protocol runs (or random/classical)
    seed_index: int
    problem: Problem
    protocol_data: dict | None  # the planner strategy's protocol (None: random/classical)
    base_protocol_data: dict
    n_start: int
    budget: int
    base_seed: int
    noise_scale: float
    noise: dict
    pool_size: int | None
    X_start: np.ndarray | None  # the seed's starting runs (None for classical)


def _seeds(base_seed: int, seed_index: int) -> tuple[np.random.Generator, int]:
    """Start-design generator and campaign seed of one seed index (the same for every strategy)."""
    start = np.random.default_rng(np.random.SeedSequence(base_seed, spawn_key=(seed_index, 0)))
    campaign = int(np.random.SeedSequence(base_seed, spawn_key=(seed_index, 1)).generate_state(1, np.uint64)[0] >> 1)
    return start, campaign


def _run_task(task: _Task) -> CampaignHistory:
    base = parse_protocol(task.base_protocol_data, source="simulation")
    measure = functools.partial(task.problem.measure, scale=task.noise_scale, noise=task.noise)
    _, seed = _seeds(task.base_seed, task.seed_index)
    if task.key == "classical":
        return run_classical(task.problem, base, n_runs=task.n_start + task.budget,
                             n_start=task.n_start, seed=seed, measure=measure,
                             pool_size=task.pool_size or CLASSICAL_POOL)
    X_start = task.X_start
    if task.key == "random":
        return run_random(task.problem, base, X_start=X_start, budget=task.budget, seed=seed,
                          measure=measure)
    protocol = parse_protocol(task.protocol_data, source=f"strategy {task.key}")
    return run_campaign(protocol, task.problem.evaluate, n_start=task.n_start, budget=task.budget,
                        seed=seed, X_start=X_start, measure=measure, pool_size=task.pool_size)


def _run_one_thread(task: _Task) -> CampaignHistory:
    with blas_limit():
        return _run_task(task)


def _worker_init() -> None:
    hold_blas_limit()
    # the campaigns already run side by side: each plans in one process, one thread
    from guardband.planner.models import gp
    from guardband.planner.step import plan as step

    step.FIT_WORKERS = 1
    gp.PREDICT_WORKERS = 1


# ------------------------------------------------------------ results
def _quantiles(values, qs=QUARTILES) -> list[float]:
    """Linear-interpolation quantiles that treat +inf as larger than everything; NaN dropped."""
    v = np.sort(np.asarray(values, dtype=float)[~np.isnan(np.asarray(values, dtype=float))])
    if v.size == 0:
        return [float("nan")] * len(qs)
    out = []
    for q in qs:
        h = (v.size - 1) * q
        lo, hi = int(math.floor(h)), int(math.ceil(h))
        if lo == hi or v[lo] == v[hi]:
            out.append(float(v[lo]))
        elif math.isinf(v[hi]):
            out.append(float("inf"))
        else:
            out.append(float(v[lo] + (h - lo) * (v[hi] - v[lo])))
    return out


@dataclass(frozen=True)
class SimulationResult:
    """Every simulated campaign of one call to :func:`simulate`, and their summaries.

    Attributes
    ----------
    problem : Problem
    protocol : Protocol
        The combined protocol (problem's world, settings' planner).
    strategies : tuple of str
    same_as : dict of str to str
        Strategy -> the strategy whose campaigns it shares (equal protocols).
    histories : dict of str to list of CampaignHistory
        One per seed, for every strategy.
    n_start, budget, seeds, base_seed : int
    noise_scale : float
    noise : dict
    workers : int
    """

    problem: Problem
    protocol: Protocol
    strategies: tuple[str, ...]
    same_as: dict
    histories: dict
    n_start: int
    budget: int
    seeds: int
    base_seed: int
    noise_scale: float
    noise: dict
    workers: int

    # -------------------------------------------------------- trajectories
    def trajectories(self, strategy: str) -> dict[str, np.ndarray]:
        """Per seed and planned-run count k = 0..budget.

        Returns
        -------
        dict with arrays of shape (seeds, budget + 1):
            ``best`` (NaN before a safe run), ``gap`` (inf before a safe run),
            ``broken`` (share of planned runs so far that broke a limit; NaN
            at k = 0), ``made`` (planned runs actually made by k, fewer than
            k when a campaign stopped early), ``gap_true`` (the gap of the
            *true* objective at the run the lab would pick, the best measured
            among runs measured within every limit; equal to ``gap`` without
            noise; inf before a safe run).
        """
        sign = -1.0 if self.protocol.maximize else 1.0
        obj = self.protocol.objective.name
        B, S = self.budget, self.seeds
        best = np.full((S, B + 1), np.nan)
        chosen_true = np.full((S, B + 1), np.nan)
        broken = np.full((S, B + 1), np.nan)
        made = np.zeros((S, B + 1), dtype=int)
        for s, h in enumerate(self.histories[strategy]):
            n_start = int((~h.planned).sum())
            n_planned = int(h.planned.sum())
            chosen = _chosen_runs(self.protocol, h.Y) if obj in h.Y and obj in h.T else None
            for k in range(B + 1):
                m = min(k, n_planned)
                made[s, k] = m
                last = n_start + m - 1
                best[s, k] = h.best_safe[last] if last >= 0 else np.nan
                if chosen is not None and last >= 0 and chosen[last] >= 0:
                    chosen_true[s, k] = h.T[obj][chosen[last]]
                if m:
                    broken[s, k] = float(np.mean(h.broke_limit[n_start:n_start + m]))
        gap = np.where(np.isnan(best), np.inf, sign * (best - self.problem.optimum) + 0.0)  # no -0
        gap_true = np.where(np.isnan(chosen_true), np.inf, sign * (chosen_true - self.problem.optimum) + 0.0)
        return {"best": best, "gap": gap, "broken": broken, "made": made, "gap_true": gap_true}

    def checkpoints(self) -> list[int]:
        """Planned-run counts shown in the table: 0, about a quarter, half, three quarters, all."""
        B = self.budget
        return sorted({0, *(int(round(B * f)) for f in (0.25, 0.5, 0.75)), B})

    # ------------------------------------------------------------ summaries
    def summary_rows(self, counts=None) -> list[dict]:
        """One row per strategy and planned-run count (every count by default)."""
        counts = range(self.budget + 1) if counts is None else counts
        rows = []
        for st in self.strategies:
            tr = self.trajectories(st)
            for k in counts:
                b, g, r = _quantiles(tr["best"][:, k]), _quantiles(tr["gap"][:, k]), _quantiles(tr["broken"][:, k])
                gt = _quantiles(tr["gap_true"][:, k])
                made = int(tr["made"][:, k].sum())
                pooled = (float(np.nansum(tr["broken"][:, k] * tr["made"][:, k]) / made)
                          if made else float("nan"))
                rows.append({
                    "strategy": st,
                    "planned_runs": int(k),
                    "seeds": self.seeds,
                    "best_q25": b[0], "best_median": b[1], "best_q75": b[2],
                    "gap_q25": g[0], "gap_median": g[1], "gap_q75": g[2],
                    "broken_q25": r[0], "broken_median": r[1], "broken_q75": r[2],
                    "gap_true_q25": gt[0], "gap_true_median": gt[1], "gap_true_q75": gt[2],
                    "broken_pooled": pooled,
                    "runs_made": made,
                    "no_safe_run": int(np.sum(np.isnan(tr["best"][:, k]))),
                })
        return rows

    def final_rows(self) -> list[dict]:
        """One row per strategy at the full budget, with stalls and calibration."""
        rows = []
        for row, st in zip(self.summary_rows([self.budget]), self.strategies):
            cal = self.calibration(st)
            row = dict(row)
            row["same_as"] = self.same_as.get(st, "")
            row["stalled"] = int(sum(h.stalled for h in self.histories[st]))
            row.update(cal)
            rows.append(row)
        return rows

    def calibration(self, strategy: str) -> dict:
        """Mean promised joint figure vs observed share meeting every limit (planned runs, all seeds)."""
        promised, met = [], []
        for h in self.histories[strategy]:
            promised.append(h.promised[h.planned])
            met.append(~h.broke_limit[h.planned])
        p = np.concatenate(promised) if promised else np.zeros(0)
        m = np.concatenate(met) if met else np.zeros(0, bool)
        has = np.isfinite(p)
        return {
            "promised_joint_mean": float(np.mean(p[has])) if np.any(has) else float("nan"),
            "observed_met_share": float(np.mean(m[has])) if np.any(has) else float("nan"),
            "n_promised": int(np.sum(has)),
        }

    # -------------------------------------------------------------- output
    CSV_COLUMNS = ("strategy", "planned_runs", "seeds", "best_q25", "best_median", "best_q75",
                   "gap_q25", "gap_median", "gap_q75", "gap_true_q25", "gap_true_median", "gap_true_q75",
                   "broken_q25", "broken_median", "broken_q75", "broken_pooled", "runs_made", "no_safe_run")

    def description(self) -> list[str]:
        """Lines saying what was simulated (for comments and the terminal)."""
        p = self.protocol
        noise = "off" if self.noise_scale == 0 else (
            f"scale {self.noise_scale:g} of the problem's noise"
            + (f", sd {self.noise}" if self.noise else "")
            + (f"; {', '.join(self.problem.cohort)} measured out of a cohort of "
               f"{', '.join(str(v) for v in self.problem.cohort.values())}" if self.problem.cohort else ""))
        return [
            f"problem {self.problem.name}: {self.problem.source}",
            f"known optimum {self.problem.optimum:.10g} ({p.objective.direction}) "
            f"at {tuple(round(float(v), 6) for v in self.problem.optimum_x)}",
            f"{self.seeds} seeds (base seed {self.base_seed}); {self.n_start} starting runs + "
            f"{self.budget} planned runs; measurement noise {noise}",
            f"settings: threshold {p.screen.threshold:g} ({p.screen.joint}), rule {p.ranking.rule} "
            f"(kappa {p.ranking.kappa:g}, xi {p.ranking.xi:g}), batch {p.batch.size}, "
            f"pool {p.batch.pool}, refine {p.batch.refine}, restarts {p.model.restarts}; "
            "limits: " + "; ".join(f"{lim.describe()} with probability >= {lim.probability:g}"
                                   for lim in p.limits),
        ]

    def cautions(self) -> tuple[str, ...]:
        from guardband.safety.cautions import cautions_for

        return (SIMULATION_CAUTION,) + cautions_for(self.protocol.study.kind)

    def csv_text(self) -> str:
        """Every strategy at every planned-run count, as CSV with comment lines."""
        rows = self.summary_rows()
        return write_csv_text([[r[c] for c in self.CSV_COLUMNS] for r in rows], list(self.CSV_COLUMNS),
                              comment_lines=self.description() + [f"CAUTION: {c}" for c in self.cautions()],
                              float_format=".6g")

    def table_text(self) -> str:
        """Readable tables: the state at the full budget, the gap over run counts, calibration."""
        def band(q25, med, q75):
            return f"{_fmt(med)} [{_fmt(q25)}, {_fmt(q75)}]"

        final = self.final_rows()
        head1 = ["strategy", "best safe (median [IQR])", "gap to optimum", "broke a limit (pooled)",
                 "per seed (median [IQR])", "no safe run", "stalled"]
        rows1 = [[_label(r), band(r["best_q25"], r["best_median"], r["best_q75"]),
                  band(r["gap_q25"], r["gap_median"], r["gap_q75"]),
                  _pct(r["broken_pooled"]),
                  f"{_pct(r['broken_median'])} [{_pct(r['broken_q25'])}, {_pct(r['broken_q75'])}]",
                  r["no_safe_run"], r["stalled"]] for r in final]
        if self.noise_scale > 0:
            # with noise the best measured value is flattered by luck; the true
            # value at the run the lab would pick is the fair gap
            head1.insert(3, "true gap at the chosen run")
            for row, r in zip(rows1, final):
                row.insert(3, band(r["gap_true_q25"], r["gap_true_median"], r["gap_true_q75"]))
        counts = self.checkpoints()
        by = {(r["strategy"], r["planned_runs"]): r for r in self.summary_rows(counts)}
        head2 = ["median gap after k planned runs"] + [f"k={k}" for k in counts]
        rows2 = [[st] + [_fmt(by[(st, k)]["gap_median"]) for k in counts] for st in self.strategies]
        head3 = ["strategy", "mean promised joint", "observed share meeting every limit", "runs"]
        rows3 = [[_label(r), _fmt(r["promised_joint_mean"]), _fmt(r["observed_met_share"]), r["n_promised"]]
                 for r in final if r["n_promised"]]
        parts = ["\n".join(self.description()), "",
                 f"after {self.budget} planned runs:", render_table(head1, rows1, max_width=60), "",
                 render_table(head2, rows2)]
        if rows3:
            parts += ["", "calibration of the screen (planned runs, all seeds):", render_table(head3, rows3)]
        return "\n".join(parts)

    def to_dict(self) -> dict:
        """JSON-able summary: description, final rows, every row, calibration, cautions."""
        return {
            "problem": self.problem.name,
            "source": self.problem.source,
            "optimum": self.problem.optimum,
            "optimum_x": list(self.problem.optimum_x),
            "maximize": self.protocol.maximize,
            "n_start": self.n_start,
            "budget": self.budget,
            "seeds": self.seeds,
            "base_seed": self.base_seed,
            "noise_scale": self.noise_scale,
            "noise": dict(self.noise),
            "protocol_fingerprint": self.protocol.fingerprint,
            "description": self.description(),
            "final": [_finite(r) for r in self.final_rows()],
            "rows": [_finite(r) for r in self.summary_rows()],
            "cautions": list(self.cautions()),
        }


def _chosen_runs(protocol: Protocol, Y: dict) -> np.ndarray:
    """Index of the best measured run among those measured within every limit, per prefix (-1 before any)."""
    y = np.asarray(Y[protocol.objective.name], dtype=float)
    ok = ~_broke(protocol, Y) & np.isfinite(y)
    sign = -1.0 if protocol.maximize else 1.0
    out = np.full(y.shape[0], -1, dtype=int)
    current = -1
    for i in range(y.shape[0]):
        if ok[i] and (current < 0 or sign * y[i] < sign * y[current]):
            current = i
        out[i] = current
    return out


def _finite(row: dict) -> dict:
    return {k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in row.items()}


def _fmt(v) -> str:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "-"
    if isinstance(v, float) and math.isinf(v):
        return "inf" if v > 0 else "-inf"
    return f"{v:.4g}"


def _pct(v) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "-"
    return f"{100 * v:.1f}%"


def _label(row: dict) -> str:
    return row["strategy"] + (f" (= {row['same_as']})" if row.get("same_as") else "")


# ------------------------------------------------------------- simulate
def simulate(
    problem: str | Problem,
    settings: str | Path | Protocol | None = None,
    *,
    budget: int | None = None,
    seeds: int = 5,
    n_start: int | None = None,
    strategies=STRATEGIES,
    noise_scale: float = 0.0,
    noise: dict | None = None,
    workers: int | None = None,
    seed: int = 0,
    pool_size: int | None = None,
    progress=None,
) -> SimulationResult:
    """Run simulated campaigns of several strategies on a test problem.

    Parameters
    ----------
    problem : str or Problem
        A built-in problem name (:data:`planner.problems.PROBLEMS`) or a problem.
    settings : path, Protocol or None
        The protocol whose planner settings are used (see the module
        docstring); None or ``"-"`` keeps the problem's own.
    budget : int, optional
        Planned runs per campaign (default: the problem's suggestion).
    seeds : int
        Campaigns per strategy; seed i uses the same starting runs for every strategy.
    n_start : int, optional
        Starting runs (default: the problem's suggestion).
    strategies : sequence of str
        From :data:`STRATEGIES`.
    noise_scale : float
        Multiplies the problem's measurement noise; 0 is noise-free.
    noise : dict of str to float, optional
        Gaussian noise sd per response, replacing the problem's.
    workers : int, optional
        Worker processes (default min(2, CPUs)); 1 runs in this process.
    seed : int
        Base seed.
    pool_size : int, optional
        Overrides the candidate pool of every planning step and the pool of
        the classical route (default :data:`CLASSICAL_POOL`).
    progress : callable, optional
        ``progress(done, total)`` after each finished campaign.

    Returns
    -------
    SimulationResult

    Raises
    ------
    ProtocolError
        When the settings protocol cannot be read or is invalid.
    ValueError
        Unknown problem or strategy, or a count below 1.
    """
    if isinstance(problem, str):
        problem = get_problem(problem)
    if isinstance(settings, (str, Path)):
        settings = None if str(settings) == "-" else load_protocol(settings)
    budget = problem.budget if budget is None else int(budget)
    n_start = problem.n_start if n_start is None else int(n_start)
    seeds, workers = int(seeds), default_workers() if workers is None else int(workers)
    for name, v, least in (("budget", budget, 1), ("seeds", seeds, 1), ("start", n_start, 3),
                           ("workers", workers, 1)):
        if v < least:
            raise ValueError(f"{name} must be at least {least}, got {v}")
    strategies = tuple(dict.fromkeys(strategies))
    if not strategies:
        raise ValueError("give at least one strategy")
    for st in strategies:
        _check_strategy(st)
    noise = dict(noise or {})
    protocol = combine_settings(problem, settings)
    base = protocol.model_dump(mode="python")
    # planner strategies with equal protocols share their campaigns
    runs_as, same_as, by_print = {}, {}, {}
    for st in strategies:
        p = strategy_protocol(protocol, st)
        if p is None:
            runs_as[st] = (st, None)
            continue
        key = p.fingerprint
        if key in by_print:
            same_as[st] = by_print[key]
        else:
            by_print[key] = st
        runs_as[st] = (by_print[key], p.model_dump(mode="python"))
    unique = {}
    for st, (owner, data) in runs_as.items():
        unique.setdefault(owner, data)
    starts = {}
    if any(owner != "classical" for owner in unique):
        with blas_limit():
            # one starting design per seed, shared by every strategy but classical
            starts = {s: start_runs(protocol, n_start, rng=_seeds(int(seed), s)[0]) for s in range(seeds)}
    tasks = [_Task(owner, s, problem, data, base, n_start, budget, int(seed), float(noise_scale),
                   noise, pool_size, None if owner == "classical" else starts[s])
             for owner, data in unique.items() for s in range(seeds)]
    done: dict = {}
    total = len(tasks)
    if workers == 1:
        for t in tasks:
            done[(t.key, t.seed_index)] = _run_one_thread(t)
            if progress is not None:
                progress(len(done), total)
    else:
        # fork where the platform has it: no main-module guard needed in
        # scripts, and workers start at once; spawn elsewhere
        methods = multiprocessing.get_all_start_methods()
        ctx = multiprocessing.get_context("fork" if "fork" in methods else "spawn")
        with ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=_worker_init) as pool:
            futures = {pool.submit(_run_task, t): (t.key, t.seed_index) for t in tasks}
            for fut in as_completed(futures):
                done[futures[fut]] = fut.result()
                if progress is not None:
                    progress(len(done), total)
    histories = {st: [done[(runs_as[st][0], s)] for s in range(seeds)] for st in strategies}
    return SimulationResult(
        problem=problem, protocol=protocol, strategies=strategies, same_as=same_as,
        histories=histories, n_start=n_start, budget=budget, seeds=seeds, base_seed=int(seed),
        noise_scale=float(noise_scale), noise=noise, workers=workers,
    )


# ------------------------------------------------------ from the command line
class OptionError(ValueError):
    """A simulation option given on the command line cannot be used (a usage error)."""


def simulate_from_options(
    problem: str,
    settings: str | Path | None,
    *,
    budget: int | None = None,
    seeds: int = 5,
    start: int | None = None,
    noise_values=(),
    strategies: str = "all",
    workers: int | None = None,
    seed: int = 0,
    pool_size: int | None = None,
    progress=None,
) -> SimulationResult:
    """:func:`simulate` with options as the command line gives them.

    Parameters
    ----------
    problem : str
        A built-in problem name.
    settings : path or None
        The settings protocol; None or ``"-"`` for the problem's own.
    noise_values : sequence of str
        ``--noise`` values (see :func:`parse_noise`).
    strategies : str
        ``"all"`` or names separated by commas.
    budget, seeds, start, workers, seed, pool_size, progress
        As in :func:`simulate` (``start`` is ``n_start``).

    Returns
    -------
    SimulationResult

    Raises
    ------
    OptionError
        An unknown problem or strategy, or an unreadable ``--noise`` value.
    ProtocolError
        The settings protocol cannot be read or is invalid.
    """
    if problem not in PROBLEMS:
        raise OptionError(f"unknown problem {problem!r}; built-in problems: {', '.join(sorted(PROBLEMS))}")
    prob = PROBLEMS[problem]
    names = STRATEGIES if strategies.strip() == "all" else tuple(
        s.strip() for s in strategies.split(",") if s.strip())
    for st in names:
        if st not in STRATEGIES:
            raise OptionError(f"unknown strategy {st!r}; strategies: {', '.join(STRATEGIES)} (or all)")
    if not names:
        raise OptionError("give at least one strategy, e.g. --strategies protocol,random")
    try:
        scale, sds = parse_noise(noise_values, prob)
    except ValueError as exc:
        raise OptionError(str(exc)) from None
    return simulate(prob, settings, budget=budget, seeds=seeds, n_start=start, strategies=names,
                    noise_scale=scale, noise=sds, workers=workers, seed=seed, pool_size=pool_size,
                    progress=progress)
