"""Uniform candidates from the design space by hit-and-run (Smith 1984).

Each chain starts at the Chebyshev centre of its slice (an interior point)
and walks in the null space of the equalities, so it stays inside the
polytope however thin it is; with discrete factors, each sample first gets
a feasible level combination and then walks in that combination's slice.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from guardband.planner.errors import ProtocolError
from guardband.planner.models.blas import blas_limit
from guardband.planner.settings import FEASIBILITY_TOL, HIT_AND_RUN_BURN_IN, HIT_AND_RUN_THIN
from guardband.planner.space.slices import Slice, finish

if TYPE_CHECKING:
    from guardband.planner.space.polytope import DesignSpace

__all__ = ["sample", "HIT_AND_RUN", "DEFAULT_N_CHAINS", "SLACK_REFRESH"]

#: The one sampling method.
HIT_AND_RUN = "hit-and-run"
#: Chains run in parallel by default (one matrix product per step for all of them).
DEFAULT_N_CHAINS = 1024
#: Slacks of the walk are recomputed from scratch every this many steps (stops drift).
SLACK_REFRESH = 50


def sample(space: DesignSpace, n: int, *, rng, method: str = HIT_AND_RUN,
           burn_in: int | None = None, thin: int | None = None,
           n_chains: int | None = None) -> np.ndarray:
    """Draw candidates uniformly from the design space by hit-and-run.

    Parameters
    ----------
    space : DesignSpace
    n : int
        Number of points.
    rng : numpy.random.Generator or int
        Source of randomness; the same seed gives the same points.
    method : {"hit-and-run"}
    burn_in, thin : int, optional
        Steps before the first kept point of a chain, and between kept
        points (defaults HIT_AND_RUN_BURN_IN, HIT_AND_RUN_THIN).
    n_chains : int, optional
        Chains run in parallel (default min(n, 1024)).

    Returns
    -------
    ndarray of shape (n, n_factors)
        Every row passes :meth:`DesignSpace.contains`.

    Notes
    -----
    Each chain starts at the Chebyshev centre and walks in the null space
    of the equalities (Smith 1984): a direction uniform on the sphere,
    the chord through the current point cut in closed form by every
    inequality and bound, a uniform point on the chord. With discrete
    factors, each sample first gets a feasible level combination
    (uniformly among them), then the walk runs in that combination's
    slice of the continuous factors. Walking in null-space coordinates
    keeps the equalities exact up to rounding; slacks are recomputed
    from scratch every few steps so that they do not drift.
    """
    if method != HIT_AND_RUN:
        raise ValueError(f"unknown sampling method {method!r}; use {HIT_AND_RUN!r}")
    n = int(n)
    if n < 0:
        raise ValueError(f"n must be non-negative, got {n}")
    rng = np.random.default_rng(rng)
    space._require_nonempty()
    burn_in = HIT_AND_RUN_BURN_IN if burn_in is None else int(burn_in)
    thin = HIT_AND_RUN_THIN if thin is None else int(thin)
    if burn_in < 0 or thin < 1:
        raise ValueError(f"burn_in must be >= 0 and thin >= 1, got {burn_in}, {thin}")
    X = np.empty((n, space.n_factors))
    if n == 0:
        return X
    if not space.levels:
        X[:] = _walk(space, space._geometry[1], n, rng, burn_in, thin, n_chains)
        return X
    combinations = space._combinations
    V = combinations.draw(n, rng)
    # Samples whose combinations shift the mixed rows alike share a slice.
    _, group = np.unique(np.round(combinations.shift_key(V), 12), axis=0, return_inverse=True)
    group = group.reshape(-1)
    for g in range(int(group.max()) + 1):
        rows = np.flatnonzero(group == g)
        sl = combinations.slice_for(V[rows[0]])
        X[rows] = _walk(space, sl, rows.size, rng, burn_in, thin, n_chains, V[rows])
    return X


def _walk(space: DesignSpace, sl: Slice, n: int, rng, burn_in: int, thin: int,
          n_chains: int | None, discrete: np.ndarray | None = None) -> np.ndarray:
    """n points of one slice (discrete columns from ``discrete``), each checked."""
    if sl.dim == 0:
        S = np.zeros((n, 0))
    else:
        chains = min(n, DEFAULT_N_CHAINS) if n_chains is None else max(1, min(int(n_chains), n))
        with blas_limit():  # small matrix products are faster on one thread
            S = _hit_and_run(sl.G, sl.h, n, chains, burn_in, thin, rng)
    X = finish(space, sl, sl.to_x(S), discrete)
    ok = space.contains(X)
    if not ok.all():
        X[~ok] = finish(space, sl, sl.to_x(sl.pull_in(sl.to_s(X[~ok]))),
                        None if discrete is None else discrete[~ok])
        ok = space.contains(X)
    if not ok.all():
        good = np.flatnonzero(ok)
        if good.size == 0:
            raise ProtocolError(
                "the design space is too thin to hold sampled points within the "
                f"tolerance {FEASIBILITY_TOL:g}; widen the tightest bounds"
            )
        X[~ok] = X[rng.choice(good, size=int((~ok).sum()))]
    return X


def _hit_and_run(G: np.ndarray, h: np.ndarray, n: int, n_chains: int, burn_in: int,
                 thin: int, rng: np.random.Generator) -> np.ndarray:
    """Vectorised hit-and-run in {s : G s <= h}, every chain starting at s = 0.

    Parameters
    ----------
    G : array of shape (m, k)
    h : array of shape (m,)
        Slacks at the start point (non-negative).
    n, n_chains, burn_in, thin : int

    Returns
    -------
    ndarray of shape (n, k)
        Rows ordered so that the first ``n_chains`` come from different chains.

    Notes
    -----
    Chains are columns: one (m, k) @ (k, n_chains) product per step, and the
    chord ends are reductions over rows (contiguous in memory).
    """
    m, k = G.shape
    C = n_chains
    per_chain = -(-n // C)
    total = burn_in + (per_chain - 1) * thin
    G = np.ascontiguousarray(G)
    T = np.zeros((k, C))
    S = np.repeat(h[:, None], C, axis=1)
    U = np.empty((k, C))
    Dm = np.empty((m, C))
    Q = np.empty((m, C))
    norm = np.empty(C)
    lam = np.empty(C)
    out = np.empty((per_chain, C, k))
    kept = 0
    if burn_in == 0:
        out[0] = T.T
        kept = 1
    with np.errstate(divide="ignore", invalid="ignore"):
        for step in range(1, total + 1):
            rng.standard_normal(out=U)
            np.sqrt(np.einsum("ij,ij->j", U, U), out=norm)
            U /= norm
            np.matmul(G, U, out=Dm)
            # Chord: lam * Dm_i <= S_i for every row. With S >= 0, Q = Dm / S is
            # largest on the nearest wall ahead and smallest on the nearest wall
            # behind, so the chord is [1 / min Q, 1 / max Q] (S_i = 0: a zero end).
            np.divide(Dm, S, out=Q)
            up = 1.0 / Q.max(axis=0)
            low = 1.0 / Q.min(axis=0)
            rng.random(out=lam)
            lam *= up - low
            lam += low
            lam[~(np.isfinite(lam) & (up >= 0.0) & (low <= 0.0))] = 0.0
            T += lam * U
            if step % SLACK_REFRESH == 0:
                np.matmul(G, T, out=S)
                np.subtract(h[:, None], S, out=S)
            else:
                Dm *= lam
                S -= Dm
            np.maximum(S, 0.0, out=S)
            if step >= burn_in and (step - burn_in) % thin == 0 and kept < per_chain:
                out[kept] = T.T
                kept += 1
    return out.reshape(-1, k)[:n]
