"""Simulated campaigns: the planner against a test problem that plays the lab.

A campaign starts from a starting design, then repeats planning steps,
"measures" every proposal with the problem's functions (plus optional
noise) and feeds the results back, until the budget of planned runs is
spent. The history records, per run, whether it broke a limit and the best
measured objective among runs that met every limit so far.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

import numpy as np

from .designs import starting_design
from .protocol import Protocol
from .runs import RunsTable
from .step import plan_step, within_limit

__all__ = ["CampaignHistory", "runs_table_from_arrays", "run_campaign"]


@dataclass(frozen=True)
class CampaignHistory:
    """What happened in one simulated campaign.

    Attributes
    ----------
    X : array (n_runs, n_factors)
    Y : dict of response -> array (n_runs,)  (measured, noise included)
    planned : bool array (n_runs,)  False for the starting runs
    broke_limit : bool array (n_runs,)  by the *true* (noise-free) responses
    best_safe : array (n_runs,)  best measured objective among safe runs so far (NaN before any)
    promised : array (n_runs,)  joint figure the screen promised for planned runs (NaN for starts)
    stalled : bool  True when a step proposed nothing before the budget was spent
    """

    X: np.ndarray
    Y: dict
    planned: np.ndarray
    broke_limit: np.ndarray
    best_safe: np.ndarray
    promised: np.ndarray
    stalled: bool

    @property
    def share_broken_planned(self) -> float:
        n = int(self.planned.sum())
        return float(self.broke_limit[self.planned].sum() / n) if n else float("nan")


def runs_table_from_arrays(protocol: Protocol, X: np.ndarray, Y: dict) -> RunsTable:
    """An in-memory runs table (for simulation and tests)."""
    X = np.asarray(X, dtype=float)
    n = X.shape[0]
    digest = hashlib.sha256(X.tobytes() + b"".join(np.asarray(Y[r], float).tobytes()
                                                    for r in protocol.response_names)).hexdigest()
    return RunsTable(
        run_ids=tuple(f"R{i + 1:03d}" for i in range(n)),
        X=X.copy(),
        Y={r: np.asarray(Y[r], dtype=float).copy() for r in protocol.response_names},
        notes=("",) * n,
        flags=(),
        sha256=digest,
        source="simulated",
        factor_names=protocol.factor_names,
    )


def _broke(protocol: Protocol, truth: dict) -> np.ndarray:
    n = len(next(iter(truth.values())))
    ok = np.ones(n, dtype=bool)
    for lim in protocol.limits:
        ok &= within_limit(np.asarray(truth[lim.name], float), lim)
    return ~ok


def run_campaign(
    protocol: Protocol,
    evaluate,
    *,
    n_start: int,
    budget: int,
    seed: int,
    noise: dict | None = None,
    X_start: np.ndarray | None = None,
) -> CampaignHistory:
    """Run one simulated campaign.

    Parameters
    ----------
    protocol : Protocol
        Its batch size, rule and screen settings are used as they are.
    evaluate : callable
        ``evaluate(X) -> dict[str, ndarray]`` true responses.
    n_start : int
        Starting runs (from :func:`planner.designs.starting_design`, inside
        the protocol's starting region when it declares one).
    budget : int
        Planned runs after the start.
    seed : int
    noise : dict, optional
        Measurement noise sd per response.
    X_start : array, optional
        Use these starting runs instead of making a design.
    """
    rng = np.random.default_rng(seed)
    noise = noise or {}
    space = protocol.design_space()
    if X_start is None:
        region = protocol.start_rows()
        mixture = [k for k, f in enumerate(protocol.factors) if f.kind == "component"] or None
        X_start, _ = starting_design(space, n_start, rng=rng, mixture_indices=mixture,
                                     region=None if region is None else region[:2])
    X = np.asarray(X_start, dtype=float)

    def measure(Xn):
        truth = evaluate(Xn)
        meas = {r: np.asarray(truth[r], float) + (rng.normal(0, noise[r], Xn.shape[0]) if noise.get(r) else 0.0)
                for r in protocol.response_names}
        return truth, meas

    truth, Y = measure(X)
    broke = list(_broke(protocol, truth))
    planned = [False] * X.shape[0]
    promised = [np.nan] * X.shape[0]
    stalled = False
    step = 0
    while sum(planned) < budget:
        runs = runs_table_from_arrays(protocol, X, Y)
        k = min(protocol.batch.size, budget - sum(planned))
        result = plan_step(protocol, runs, seed=int(rng.integers(2**62)) + step, count=k)
        step += 1
        if not result.proposals:
            stalled = True
            break
        Xn = np.array([p.x for p in result.proposals])
        t, m = measure(Xn)
        X = np.vstack([X, Xn])
        Y = {r: np.concatenate([Y[r], m[r]]) for r in Y}
        broke += list(_broke(protocol, t))
        planned += [True] * Xn.shape[0]
        promised += [p.joint for p in result.proposals]
    best = np.full(X.shape[0], np.nan)
    y = Y[protocol.objective.name]
    sign = -1.0 if protocol.maximize else 1.0
    current = np.nan
    measured_ok = ~_broke(protocol, {r: Y[r] for r in protocol.limit_names}) if protocol.limits else np.ones(X.shape[0], bool)
    for i in range(X.shape[0]):
        if measured_ok[i] and np.isfinite(y[i]) and (np.isnan(current) or sign * y[i] < sign * current):
            current = y[i]
        best[i] = current
    return CampaignHistory(
        X=X, Y=Y, planned=np.array(planned), broke_limit=np.array(broke), best_safe=best,
        promised=np.array(promised, dtype=float), stalled=stalled,
    )
