"""The planner's peers: random runs, and the classical route (a design, quadratic fits, a confirmation run).

Both spend the same number of runs as the planner strategies, on the same
problem and with the same measurement, so that a simulation compares like
with like (see :mod:`guardband.planner.simulation.strategies`).

``random``
    The same starting runs as the planner, then the budget spent on points
    drawn uniformly from the design space (:meth:`DesignSpace.sample`); no
    start region, step rule or forbidden region.
``classical``
    A space-filling design (:func:`guardband.planner.space.designs.maximin`)
    of ``n_start + budget - 1`` runs over the whole design space, a
    quadratic model fitted by least squares to every response
    (:func:`~guardband.planner.simulation.quadratic.fit_quadratic`), and
    one confirmation run at the best point of the fitted objective that
    meets the fitted limits (a large sampled pool, then SLSQP). Same total
    number of runs as the others.
"""

from __future__ import annotations

import numpy as np

from guardband.planner.inputs.protocol import Protocol
from guardband.planner.simulation.loop import CampaignHistory, campaign_history
from guardband.planner.simulation.problems import Problem, limit_slack, slsqp_in_space
from guardband.planner.simulation.quadratic import fit_quadratic
from guardband.planner.space.designs import maximin

__all__ = ["CLASSICAL_POOL", "CLASSICAL_POLISH", "classical_point", "run_random", "run_classical"]

#: Sampled pool of the classical route's search for its fitted best point.
CLASSICAL_POOL = 20000
#: Points of the classical route's pool polished by SLSQP.
CLASSICAL_POLISH = 5


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
        values = {lim.name: float(models[lim.name].predict(x)[0]) for lim in protocol.limits}
        return limit_slack(protocol, values)

    for i in order[:CLASSICAL_POLISH]:
        x = slsqp_in_space(space, pool[i], f, g if protocol.limits else None)
        if x is None:
            continue
        p = {r: m.predict(x) for r, m in models.items()}
        if _violation(protocol, p, scale)[0] <= 1e-9 and f(x) < best_v:
            best_x, best_v = x, f(x)
    return best_x


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
    return campaign_history(protocol, X, T, Y, np.arange(X.shape[0]) >= X0.shape[0])


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
    return campaign_history(protocol, X, T, Y, np.arange(X.shape[0]) >= n_start,
                            message=f"quadratic models ({kind}); confirmation run at the fitted best point")
