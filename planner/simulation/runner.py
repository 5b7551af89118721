"""Simulated campaigns: what a protocol's choices cost and risk, before any lab work.

The lab is replaced by a test problem with known answers
(:mod:`guardband.planner.simulation.problems`), with optional measurement
noise. Several strategies
(:mod:`guardband.planner.simulation.strategies`) spend the same budget on
the same problem, over many seeds, and the result
(:class:`~guardband.planner.simulation.results.SimulationResult`) says how
good, and how safe, each one was.

Planner strategies whose combined protocols are equal (e.g. ``protocol``
and ``ei`` when the protocol ranks by EI) are run once and reported under
both names.

Seeds run in parallel worker processes, each with one BLAS thread; a
serial run (``workers=1``) uses one BLAS thread as well, so both give the
same numbers.
"""

from __future__ import annotations

import functools
import multiprocessing
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from guardband.planner.inputs.protocol import Protocol, load_protocol, parse_protocol
from guardband.planner.models import blas_limit, default_workers, hold_blas_limit
from guardband.planner.simulation.loop import CampaignHistory, run_campaign, start_runs
from guardband.planner.simulation.peers import CLASSICAL_POOL, run_classical, run_random
from guardband.planner.simulation.problems import Problem, get_problem
from guardband.planner.simulation.results import SimulationResult
from guardband.planner.simulation.strategies import (DEFAULT_STRATEGIES, PEERS, check_strategy,
                                                     combine_settings, step_options, strategy_protocol)

__all__ = ["simulate", "run_in_workers", "run_peer"]


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
    step_kw: dict | None = None  # the strategy's step options (strategies.step_options)


def _seeds(base_seed: int, seed_index: int) -> tuple[np.random.Generator, int]:
    """Start-design generator and campaign seed of one seed index (the same for every strategy)."""
    start = np.random.default_rng(np.random.SeedSequence(base_seed, spawn_key=(seed_index, 0)))
    campaign = int(np.random.SeedSequence(base_seed, spawn_key=(seed_index, 1)).generate_state(1, np.uint64)[0] >> 1)
    return start, campaign


def run_peer(strategy: str, problem: Problem, protocol: Protocol, *, X_start, n_start: int, budget: int,
             seed: int, measure, pool_size: int | None) -> CampaignHistory:
    """One campaign of a peer (``random`` or ``classical``), as :func:`simulate` and sweeps run it.

    ``X_start`` is the seed's starting design (unused by ``classical``, which
    makes its own design); ``pool_size`` None gives the classical route
    :data:`~guardband.planner.simulation.peers.CLASSICAL_POOL`.
    """
    if strategy == "classical":
        return run_classical(problem, protocol, n_runs=n_start + budget, n_start=n_start, seed=seed,
                             measure=measure, pool_size=pool_size or CLASSICAL_POOL)
    if strategy == "random":
        return run_random(problem, protocol, X_start=X_start, budget=budget, seed=seed, measure=measure)
    raise ValueError(f"{strategy!r} is not a peer; peers: {', '.join(PEERS)}")


def _run_task(task: _Task) -> CampaignHistory:
    base = parse_protocol(task.base_protocol_data, source="simulation")
    measure = functools.partial(task.problem.measure, scale=task.noise_scale, noise=task.noise)
    _, seed = _seeds(task.base_seed, task.seed_index)
    X_start = task.X_start
    if task.key in PEERS:
        return run_peer(task.key, task.problem, base, X_start=X_start, n_start=task.n_start, budget=task.budget,
                        seed=seed, measure=measure, pool_size=task.pool_size)
    protocol = parse_protocol(task.protocol_data, source=f"strategy {task.key}")
    return run_campaign(protocol, task.problem.evaluate, n_start=task.n_start, budget=task.budget,
                        seed=seed, X_start=X_start, measure=measure, pool_size=task.pool_size,
                        step_kw=task.step_kw, cohort=task.problem.cohort)


def run_in_workers(fn, jobs, *, workers: int, progress=None) -> list:
    """``[fn(job) for job in jobs]`` on worker processes, each with one BLAS thread.

    Parameters
    ----------
    fn : callable
        A module-level function (jobs and results are pickled).
    jobs : iterable
    workers : int
        Worker processes; 1 runs the jobs in this process, also with one
        BLAS thread, so both give the same numbers.
    progress : callable, optional
        ``progress(done, total)`` after each finished job.

    Returns
    -------
    list
        The results in the order of the jobs.
    """
    jobs = list(jobs)
    out: list = [None] * len(jobs)
    if workers == 1:
        with blas_limit():
            for i, job in enumerate(jobs):
                out[i] = fn(job)
                if progress is not None:
                    progress(i + 1, len(jobs))
        return out
    # fork where the platform has it: no main-module guard needed in
    # scripts, and workers start at once; spawn elsewhere
    methods = multiprocessing.get_all_start_methods()
    ctx = multiprocessing.get_context("fork" if "fork" in methods else "spawn")
    with ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=_worker_init) as pool:
        futures = {pool.submit(fn, job): i for i, job in enumerate(jobs)}
        for done, fut in enumerate(as_completed(futures), start=1):
            out[futures[fut]] = fut.result()
            if progress is not None:
                progress(done, len(jobs))
    return out


def _worker_init() -> None:
    hold_blas_limit()
    # the campaigns already run side by side: each plans in one process, one thread
    from guardband.planner.models import gp
    from guardband.planner.step import fitting as step

    step.FIT_WORKERS = 1
    gp.PREDICT_WORKERS = 1


# ------------------------------------------------------------- simulate
def simulate(
    problem: str | Problem,
    settings: str | Path | Protocol | None = None,
    *,
    budget: int | None = None,
    seeds: int = 5,
    n_start: int | None = None,
    strategies=DEFAULT_STRATEGIES,
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
        A built-in problem name (:data:`~guardband.planner.simulation.PROBLEMS`) or a problem.
    settings : path, Protocol or None
        The protocol whose planner settings are used (see
        :func:`~guardband.planner.simulation.strategies.combine_settings`);
        None or ``"-"`` keeps the problem's own.
    budget : int, optional
        Planned runs per campaign (default: the problem's suggestion).
    seeds : int
        Campaigns per strategy; seed i uses the same starting runs for every strategy.
    n_start : int, optional
        Starting runs (default: the problem's suggestion).
    strategies : sequence of str
        From :data:`~guardband.planner.simulation.strategies.STRATEGIES` (default
        :data:`~guardband.planner.simulation.strategies.DEFAULT_STRATEGIES`: all but ``textbook``).
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
        the classical route (default
        :data:`~guardband.planner.simulation.peers.CLASSICAL_POOL`).
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
        check_strategy(st)
    noise = dict(noise or {})
    # the campaigns' pool, as the result's settings line shows it
    protocol = combine_settings(problem, settings, pool=pool_size)
    base = protocol.model_dump(mode="python")
    # planner strategies with equal protocols share their campaigns
    runs_as, same_as, by_print = {}, {}, {}
    for st in strategies:
        p = strategy_protocol(protocol, st)
        if p is None:
            runs_as[st] = (st, None)
            continue
        key = (p.fingerprint, tuple(sorted(step_options(st).items())))
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
                   noise, pool_size, None if owner == "classical" else starts[s],
                   step_options(owner))
             for owner, data in unique.items() for s in range(seeds)]
    results = run_in_workers(_run_task, tasks, workers=workers, progress=progress)
    done = {(t.key, t.seed_index): r for t, r in zip(tasks, results)}
    histories = {st: [done[(runs_as[st][0], s)] for s in range(seeds)] for st in strategies}
    return SimulationResult(
        problem=problem, protocol=protocol, strategies=strategies, same_as=same_as,
        histories=histories, n_start=n_start, budget=budget, seeds=seeds, base_seed=int(seed),
        noise_scale=float(noise_scale), noise=noise, workers=workers,
    )
