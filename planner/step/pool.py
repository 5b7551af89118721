"""The candidate pool of a planning step.

Points from the hit-and-run sampler, plus candidates a short way from the
runs that met every limit towards pool points (convex combinations stay
inside the polytope); identical candidates are kept once.
"""

from __future__ import annotations

import numpy as np

__all__ = ["candidate_pool", "LOCAL_SHARE"]

#: Share of the pool drawn between safe runs and pool points (local candidates).
LOCAL_SHARE = 0.25


def candidate_pool(space, X_safe, pool_size: int, rng) -> tuple[np.ndarray, np.ndarray]:
    """Candidates and where each came from ("pool" or "local").

    Parameters
    ----------
    space : DesignSpace
    X_safe : array of shape (n_safe, n_factors)
        Runs that met every limit (none: no local candidates).
    pool_size : int
    rng : numpy.random.Generator
    """
    n_local = int(LOCAL_SHARE * pool_size) if X_safe.shape[0] else 0
    X_pool = np.asarray(space.sample(pool_size - n_local, rng=rng))
    origin = ["pool"] * X_pool.shape[0]
    if n_local:
        X_local = _local_candidates(space, X_safe, X_pool, n_local, rng)
        X_pool = np.vstack([X_pool, X_local])
        origin += ["local"] * X_local.shape[0]
    origin = np.array(origin, dtype=object)
    # identical candidates (common when every factor is discrete) are kept
    # once, in order of first appearance, so that each decision is listed once
    _, first = np.unique(X_pool, axis=0, return_index=True)
    keep = np.sort(first)
    return X_pool[keep], origin[keep]


def _local_candidates(space, X_safe, X_pool, n, rng) -> np.ndarray:
    """Points a short way from a safe run towards a pool point.

    A convex combination of two points of a convex polytope stays inside it;
    discrete factors keep the safe run's level, and any point that is not
    inside the design space (e.g. a safe run that was itself outside its
    bounds) is dropped.
    """
    a = X_safe[rng.integers(0, X_safe.shape[0], size=n)]
    b = X_pool[rng.integers(0, X_pool.shape[0], size=n)]
    t = rng.uniform(0.0, 0.3, size=(n, 1))
    X = a + t * (b - a)
    for j in space.levels:
        X[:, j] = a[:, j]
    keep = np.asarray(space.contains(X))
    return X[keep]
