"""Simulated campaigns: the planner against a test problem that plays the lab.

A campaign starts from a starting design, then repeats planning steps,
"measures" every proposal with the problem's functions (plus optional
noise) and feeds the results back, until the budget of planned runs is
spent. The history records, per run, the true and the measured responses,
whether it broke a limit (by the true responses) and the best measured
objective among runs whose measured responses met every limit so far.

A planning step that proposes nothing (no candidate passed the screen) or
whose objective model cannot be fitted ends the campaign early: a lab
would stop there too. The history says so (``stalled``, ``message``).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field

import numpy as np

from guardband.planner.space import starting_design
from guardband.planner.errors import ModelError
from guardband.planner.inputs.protocol import Protocol
from guardband.planner.inputs.runs import RunsTable
from guardband.planner.simulation.problems import measured
from guardband.planner.step import plan_step
from guardband.safety.limits import met_every_limit

__all__ = ["CampaignHistory", "campaign_history", "runs_table_from_arrays", "run_campaign", "best_so_far",
           "best_safe_runs", "start_runs"]


@dataclass(frozen=True)
class CampaignHistory:
    """What happened in one simulated campaign.

    Attributes
    ----------
    X : array (n_runs, n_factors)
    Y : dict of response -> array (n_runs,)  (measured, noise included)
    planned : bool array (n_runs,)  False for the starting runs
    broke_limit : bool array (n_runs,)  by the *true* (noise-free) responses
    best_safe : array (n_runs,)  best measured objective among runs whose
        measured responses met every limit, so far (NaN before any)
    promised : array (n_runs,)  joint figure the screen promised for planned runs (NaN for starts)
    incumbent : array (n_runs,)  the step's incumbent when each planned run was proposed (NaN for
        starts and while no run met every limit)
    stalled : bool  True when a step proposed nothing before the budget was spent
    T : dict of response -> array (n_runs,)  true responses
    modes : tuple of str  the mode of each planning step ("improve", "feasibility-first")
    message : str  why the campaign stopped early ("" when it did not)
    """

    X: np.ndarray
    Y: dict
    planned: np.ndarray
    broke_limit: np.ndarray
    best_safe: np.ndarray
    promised: np.ndarray
    stalled: bool
    T: dict = field(default_factory=dict)
    modes: tuple = ()
    message: str = ""
    incumbent: np.ndarray | None = None

    @property
    def share_broken_planned(self) -> float:
        n = int(self.planned.sum())
        return float(self.broke_limit[self.planned].sum() / n) if n else float("nan")


def runs_table_from_arrays(protocol: Protocol, X: np.ndarray, Y: dict, *, cohort: dict | None = None) -> RunsTable:
    """An in-memory runs table (for simulation and tests).

    A binomial response of the protocol (objective or limit) needs its
    subjects per run in ``cohort`` (response -> int); its events are the
    measured rate times them, rounded, and its rate is events / subjects,
    as a runs file with count columns would give.

    Raises
    ------
    ValueError
        When a binomial response has no cohort size.
    """
    X = np.asarray(X, dtype=float)
    n = X.shape[0]
    Y = {r: np.asarray(Y[r], dtype=float).copy() for r in protocol.response_names}
    counts = {}
    for item in protocol.binomial_responses:
        m = (cohort or {}).get(item.name)
        if not m:
            raise ValueError(f"{item.name!r} is a binomial response: give its subjects per run (cohort)")
        events = np.rint(Y[item.name] * m)
        subjects = np.where(np.isfinite(events), float(m), np.nan)
        counts[item.name] = (events, subjects)
        Y[item.name] = events / subjects
    digest = hashlib.sha256(X.tobytes() + b"".join(Y[r].tobytes() for r in protocol.response_names)).hexdigest()
    return RunsTable(
        run_ids=tuple(f"R{i + 1:03d}" for i in range(n)),
        X=X.copy(),
        Y=Y,
        notes=("",) * n,
        flags=(),
        sha256=digest,
        source="simulated",
        factor_names=protocol.factor_names,
        counts=counts,
    )


def best_safe_runs(protocol: Protocol, Y: dict) -> np.ndarray:
    """Index of the best run so far among runs whose values in ``Y`` meet every limit.

    Parameters
    ----------
    protocol : Protocol
    Y : dict of response -> array (n_runs,)

    Returns
    -------
    int ndarray of shape (n_runs,)
        For each prefix of the runs, the index of its best run (the first
        of equal ones); -1 until the first run that meets every limit.
    """
    y = np.asarray(Y[protocol.objective.name], dtype=float)
    ok = met_every_limit(protocol, Y) & np.isfinite(y)
    sign = -1.0 if protocol.maximize else 1.0
    out = np.full(y.shape[0], -1, dtype=int)
    current = -1
    for i in range(y.shape[0]):
        if ok[i] and (current < 0 or sign * y[i] < sign * y[current]):
            current = i
        out[i] = current
    return out


def best_so_far(protocol: Protocol, Y: dict) -> np.ndarray:
    """Running best objective among runs whose values in ``Y`` meet every limit.

    The objective of the run :func:`best_safe_runs` names, per prefix:
    an array of shape (n_runs,), NaN until the first run that meets every
    limit.
    """
    y = np.asarray(Y[protocol.objective.name], dtype=float)
    best = best_safe_runs(protocol, Y)
    return np.where(best >= 0, y[best], np.nan)


def campaign_history(protocol: Protocol, X: np.ndarray, T: dict, Y: dict, planned, *, promised=None,
                     stalled: bool = False, modes=(), message: str = "", incumbent=None) -> CampaignHistory:
    """A :class:`CampaignHistory` from the runs made: which broke a limit, the running best.

    Parameters
    ----------
    protocol : Protocol
    X : array (n_runs, n_factors)
    T, Y : dict of response -> array (n_runs,)
        True and measured responses.
    planned : bool array (n_runs,)
    promised : array (n_runs,), optional
        The screen's joint figure per run (default NaN for every run).
    stalled, modes, message
        As in :class:`CampaignHistory`.
    """
    return CampaignHistory(
        X=X, Y=Y, planned=np.asarray(planned, dtype=bool), broke_limit=~met_every_limit(protocol, T),
        best_safe=best_so_far(protocol, Y),
        promised=np.full(X.shape[0], np.nan) if promised is None else np.asarray(promised, dtype=float),
        stalled=stalled, T=T, modes=tuple(modes), message=message,
        incumbent=np.full(X.shape[0], np.nan) if incumbent is None else np.asarray(incumbent, dtype=float),
    )


def start_runs(protocol: Protocol, n_start: int, *, rng) -> np.ndarray:
    """Starting runs of a campaign, shape (n_start, n_factors).

    From :func:`~guardband.planner.space.designs.starting_design`, inside the protocol's
    starting region when it declares one.
    """
    space = protocol.design_space()
    region = protocol.start_rows()
    mixture = [k for k, f in enumerate(protocol.factors) if f.kind == "component"] or None
    X, _ = starting_design(space, n_start, rng=rng, mixture_indices=mixture,
                           region=None if region is None else region[:2])
    return X


def _gaussian(noise: dict, protocol: Protocol):
    """``measure(truth, rng)``: the protocol's responses plus Gaussian noise of sd ``noise[response]``."""
    def measure(truth, rng):
        return measured({r: truth[r] for r in protocol.response_names}, rng, noise)
    return measure


def run_campaign(
    protocol: Protocol,
    evaluate,
    *,
    n_start: int,
    budget: int,
    seed: int,
    noise: dict | None = None,
    X_start: np.ndarray | None = None,
    measure=None,
    pool_size: int | None = None,
    step_kw: dict | None = None,
    cohort: dict | None = None,
) -> CampaignHistory:
    """Run one simulated campaign.

    Parameters
    ----------
    protocol : Protocol
        Its batch size, rule and screen settings are used as they are.
    evaluate : callable
        ``evaluate(X) -> dict[str, ndarray]`` true responses.
    n_start : int
        Starting runs (from :func:`start_runs`); ignored when ``X_start`` is given.
    budget : int
        Planned runs after the start.
    seed : int
    noise : dict, optional
        Gaussian measurement noise sd per response (ignored when ``measure`` is given).
    X_start : array of shape (n_start, n_factors), optional
        Use these starting runs instead of making a design (not modified).
    measure : callable, optional
        ``measure(truth, rng) -> dict`` of measured values, e.g.
        :meth:`~guardband.planner.simulation.problems.Problem.measure`; default Gaussian ``noise``.
    pool_size : int, optional
        Candidate pool size of every step (default the protocol's).
    step_kw : dict, optional
        More keyword arguments of every :func:`~guardband.planner.step.plan_step`
        (a strategy's :func:`~guardband.planner.simulation.strategies.step_options`).
    cohort : dict, optional
        Subjects per run of each binomial response of the protocol (its
        measured rates become counts; :func:`runs_table_from_arrays`), e.g. the
        problem's :attr:`~guardband.planner.simulation.problems.Problem.cohort`.

    Returns
    -------
    CampaignHistory
    """
    rng = np.random.default_rng(seed)
    if measure is None:
        measure = _gaussian(noise or {}, protocol)
    if X_start is None:
        X_start = start_runs(protocol, n_start, rng=rng)
    X = np.array(X_start, dtype=float)

    def lab(Xn):
        truth = {r: np.asarray(v, dtype=float) for r, v in evaluate(Xn).items()}
        return truth, measure(truth, rng)

    T, Y = lab(X)
    planned = [False] * X.shape[0]
    promised = [np.nan] * X.shape[0]
    incumbents = [np.nan] * X.shape[0]
    stalled, message, modes = False, "", []
    warm: dict = {}
    step = 0
    while sum(planned) < budget:
        runs = runs_table_from_arrays(protocol, X, Y, cohort=cohort)
        k = min(protocol.batch.size, budget - sum(planned))
        try:
            # a full batch as the protocol asks (so batch.least_worth may end it early); the last,
            # cut to the budget, is forced
            result = plan_step(protocol, runs, seed=int(rng.integers(2**62)) + step,
                               count=None if k == protocol.batch.size else k,
                               warm_start=warm, pool_size=pool_size, explain=False, **(step_kw or {}))
        except ModelError as exc:
            stalled, message = True, f"step {step + 1}: {exc}"
            break
        step += 1
        modes.append(result.mode)
        warm = result.hyperparameters()
        if not result.proposals:
            stalled, message = True, f"step {step}: no candidate passed the safety screen"
            break
        Xn = np.array([p.x for p in result.proposals])
        t, m = lab(Xn)
        X = np.vstack([X, Xn])
        Y = {r: np.concatenate([Y[r], m[r]]) for r in protocol.response_names}
        T = {r: np.concatenate([T[r], t[r]]) for r in protocol.response_names}
        planned += [True] * Xn.shape[0]
        promised += [p.joint for p in result.proposals]
        incumbents += [result.incumbent["value"] if result.incumbent else np.nan] * len(result.proposals)
    return campaign_history(protocol, X, T, Y, planned, promised=promised, stalled=stalled, modes=modes,
                            message=message, incumbent=incumbents)
