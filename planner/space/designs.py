"""Starting designs for a campaign with no runs yet.

Classical mixture designs (NIST/SEMATECH e-Handbook of Statistical Methods,
section 5.5.4): the {q, m} simplex-lattice, the simplex-centroid and
lower-bound pseudo-components; and a space-filling design, greedy maximin
(farthest-point) selection from a hit-and-run pool of the design space.
All points are in protocol units.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from fractions import Fraction

import numpy as np

from guardband.planner.errors import ProtocolError
from guardband.planner.space.arrays import nan_to_none
from guardband.planner.space.polytope import DesignSpace

__all__ = [
    "simplex_lattice",
    "simplex_centroid",
    "pseudo_to_real",
    "real_to_pseudo",
    "mixture_rows",
    "MixtureDesign",
    "MixtureKind",
    "mixture_design",
    "maximin",
    "starting_design",
    "MAX_OTHER_FREE_FACTORS",
]

#: starting_design uses a centroid design only when at most this many free
#: factors lie outside the mixture (otherwise those factors would all sit at
#: their centre for every centroid point, which explores nothing).
MAX_OTHER_FREE_FACTORS = 2


class MixtureKind:
    """The classical mixture designs :func:`mixture_design` makes (plain strings)."""

    CENTROID = "centroid"
    LATTICE = "lattice"


def _check_count(value, what: str) -> int:
    if isinstance(value, bool) or int(value) != value or int(value) < 1:
        raise ValueError(f"{what} must be a positive integer, got {value!r}")
    return int(value)


def simplex_lattice(q: int, m: int) -> np.ndarray:
    """Points of the {q, m} simplex-lattice design.

    Every proportion is one of 0, 1/m, ..., 1 and each point sums to 1
    (NIST/SEMATECH e-Handbook 5.5.4.2).

    Parameters
    ----------
    q : int
        Number of components.
    m : int
        Lattice degree.

    Returns
    -------
    ndarray of shape (C(q + m - 1, m), q)
    """
    q, m = _check_count(q, "q"), _check_count(m, "m")
    rows = []
    for picks in itertools.combinations_with_replacement(range(q), m):
        rows.append(np.bincount(picks, minlength=q))
    counts = np.array(rows)
    order = np.lexsort(counts.T[::-1])[::-1]  # vertices first, reading order
    return counts[order] / m


def simplex_centroid(q: int) -> np.ndarray:
    """Points of the q-component simplex-centroid design.

    The q vertices, the C(q, 2) binary blends (1/2, 1/2), ..., and the overall
    centroid (1/q, ..., 1/q) (NIST/SEMATECH e-Handbook 5.5.4.3).

    Parameters
    ----------
    q : int

    Returns
    -------
    ndarray of shape (2**q - 1, q)
    """
    q = _check_count(q, "q")
    rows = []
    for size in range(1, q + 1):
        for subset in itertools.combinations(range(q), size):
            row = np.zeros(q)
            row[list(subset)] = 1.0 / size
            rows.append(row)
    return np.array(rows)


def _lower_total(lower, total) -> tuple[np.ndarray, float, float]:
    lower = np.asarray(lower, dtype=float).reshape(-1)
    total = float(total)
    L = float(lower.sum())
    if L >= total:
        raise ProtocolError(
            f"the component lower bounds sum to {L:.6g}, which is not below the mixture "
            f"total {total:.6g}; lower some bounds (pseudo-components need sum < total)"
        )
    return lower, total, L


def pseudo_to_real(Xp, lower, total: float = 1.0) -> np.ndarray:
    """Map lower-bound pseudo-components to real proportions.

    x_i = L_i + (total - L) x'_i with L = sum L_i (NIST/SEMATECH e-Handbook 5.5.4.4).

    Parameters
    ----------
    Xp : array of shape (n, q) or (q,)
        Pseudo-component proportions (each row sums to 1).
    lower : array of shape (q,)
        Lower bounds L_i.
    total : float

    Returns
    -------
    ndarray of the shape of ``Xp``
    """
    lower, total, L = _lower_total(lower, total)
    Xp = np.asarray(Xp, dtype=float)
    if Xp.shape[-1] != lower.size:
        raise ValueError(f"Xp has {Xp.shape[-1]} components, lower has {lower.size}")
    return lower + (total - L) * Xp


def real_to_pseudo(X, lower, total: float = 1.0) -> np.ndarray:
    """Inverse of :func:`pseudo_to_real`: x'_i = (x_i - L_i) / (total - L).

    Parameters
    ----------
    X : array of shape (n, q) or (q,)
    lower : array of shape (q,)
    total : float

    Returns
    -------
    ndarray of the shape of ``X``
    """
    lower, total, L = _lower_total(lower, total)
    X = np.asarray(X, dtype=float)
    if X.shape[-1] != lower.size:
        raise ValueError(f"X has {X.shape[-1]} components, lower has {lower.size}")
    return (X - lower) / (total - L)


def mixture_rows(space: DesignSpace) -> list[tuple[np.ndarray, float]]:
    """Mixture totals among the equality rows.

    A row whose non-zero coefficients (at least two) are all equal, a, with
    b / a > 0 reads as "these components sum to b / a".

    Returns
    -------
    list of (indices, total)
    """
    out = []
    for a, b in zip(space.A_eq, space.b_eq):
        idx = np.flatnonzero(np.abs(a) > 0)
        if idx.size >= 2 and np.allclose(a[idx], a[idx[0]], rtol=1e-12, atol=0):
            total = b / a[idx[0]]
            if total > 0:
                out.append((idx, float(total)))
    return out


@dataclass(frozen=True)
class MixtureDesign:
    """A classical mixture design mapped into the design space.

    Attributes
    ----------
    X : ndarray of shape (n_kept, n_factors)
        Points inside the design space, protocol units.
    labels : tuple of str
        One label per kept point.
    n_candidates : int
        Points of the design before screening.
    n_dropped : int
        Points outside the design space (other constraints), not kept.
    message : str
    """

    X: np.ndarray
    labels: tuple[str, ...]
    n_candidates: int
    n_dropped: int
    message: str

    def to_dict(self) -> dict:
        """Plain JSON-able dictionary."""
        return {"X": nan_to_none(self.X), "labels": list(self.labels),
                "n_candidates": self.n_candidates, "n_dropped": self.n_dropped,
                "message": self.message}


def _centroid_label(row: np.ndarray, names: list[str]) -> str:
    idx = np.flatnonzero(row > 0)
    if idx.size == 1:
        return f"vertex {names[idx[0]]}"
    if idx.size == len(names):
        return "overall centroid"
    return f"blend 1/{idx.size} each: {' + '.join(names[i] for i in idx)}"


def _lattice_label(row: np.ndarray, names: list[str], m: int) -> str:
    parts = [f"{names[i]}={Fraction(int(round(row[i] * m)), m)}" for i in np.flatnonzero(row > 0)]
    return "lattice " + ", ".join(parts)


def mixture_design(space: DesignSpace, component_indices, *, kind: str = MixtureKind.CENTROID,
                   m: int = 2, total: float | None = None) -> MixtureDesign:
    """A simplex-centroid or simplex-lattice design in lower-bound pseudo-components.

    Parameters
    ----------
    space : DesignSpace
    component_indices : sequence of int
        Columns of the mixture components (q of them).
    kind : {"centroid", "lattice"}
    m : int
        Lattice degree (``kind="lattice"``).
    total : float, optional
        Mixture total; default: read from the equality row over these columns.

    Returns
    -------
    MixtureDesign

    Notes
    -----
    The lower bounds L_i are the real minima of the components over the
    design space (never below the stated bounds), so the pseudo-component
    simplex is as small as the space allows. Factors outside the mixture sit
    at the projection of the Chebyshev centre onto the space (on a feasible
    level for a discrete factor). Points that break any other constraint
    (upper bounds, ratio limits) are dropped, and the message says which
    rules dropped them.
    """
    chk = space.check()
    if chk.empty:
        raise ProtocolError(chk.message)
    comp = np.asarray(component_indices, dtype=int).reshape(-1)
    if comp.size < 2 or np.unique(comp).size != comp.size or \
            comp.min() < 0 or comp.max() >= space.n_factors:
        raise ValueError(f"component_indices must be >= 2 distinct factor indices, got {comp}")
    if total is None:
        found = [t for idx, t in mixture_rows(space) if np.array_equal(np.sort(idx), np.sort(comp))]
        if not found:
            names = ", ".join(space.names[i] for i in comp)
            raise ProtocolError(f"no equality row makes {names} sum to a total; "
                                "give the mixture total")
        total = found[0]
    if kind == MixtureKind.CENTROID:
        P = simplex_centroid(comp.size)
    elif kind == MixtureKind.LATTICE:
        P = simplex_lattice(comp.size, m)
    else:
        raise ValueError(f"kind must be 'centroid' or 'lattice', got {kind!r}")
    names = [space.names[i] for i in comp]
    labels = [_centroid_label(p, names) if kind == MixtureKind.CENTROID
              else _lattice_label(p, names, m) for p in P]
    lower = chk.ranges[comp, 0]
    X = np.repeat(space.project(chk.centre)[None, :], P.shape[0], axis=0)
    X[:, comp] = pseudo_to_real(P, lower, total)
    keep = space.contains(X)
    reasons = sorted({space.describe_violation(x).split(":")[0] for x in X[~keep]})
    n_drop = int((~keep).sum())
    message = (f"{kind} design in {comp.size} pseudo-components (lower bounds sum to "
               f"{lower.sum():.6g}, total {total:.6g}): {int(keep.sum())} of {P.shape[0]} "
               f"points inside the design space, {n_drop} dropped")
    if reasons:
        message += f" (outside: {'; '.join(reasons)})"
    return MixtureDesign(X[keep], tuple(np.array(labels, dtype=object)[keep]),
                         int(P.shape[0]), n_drop, message)


def _restrict(space: DesignSpace, region) -> DesignSpace:
    """The space intersected with an optional region (A, b) or (A, b, labels)."""
    if region is None:
        return space
    if len(region) == 2:
        A, b = region
        labels = None
    elif len(region) == 3:
        A, b, labels = region
    else:
        raise ValueError("region must be (A, b) or (A, b, labels)")
    A = np.atleast_2d(np.asarray(A, dtype=float))
    if labels is None:
        labels = [f"starting region row {i + 1}" for i in range(A.shape[0])]
    inner = space.add_inequalities(A, b, labels)
    chk = inner.check()
    if chk.empty:
        raise ProtocolError(
            f"the starting region ({'; '.join(labels)}) leaves no point of the design "
            f"space: {chk.message}"
        )
    return inner


def _farthest_points(U: np.ndarray, n: int, *, start: int | None = None,
                     existing: np.ndarray | None = None) -> np.ndarray:
    """Greedy maximin: indices of n rows of U, each farthest from those chosen so far."""
    d2 = np.full(U.shape[0], np.inf)
    if existing is not None and existing.shape[0]:
        for e in existing:
            np.minimum(d2, np.sum((U - e) ** 2, axis=1), out=d2)
    chosen = []
    for i in range(n):
        j = int(start) if (i == 0 and start is not None) else int(np.argmax(d2))
        chosen.append(j)
        np.minimum(d2, np.sum((U - U[j]) ** 2, axis=1), out=d2)
    return np.array(chosen, dtype=int)


def maximin(space: DesignSpace, n: int, *, rng, pool_size: int = 20000, region=None,
            existing=None) -> np.ndarray:
    """Space-filling design: greedy maximin selection from a hit-and-run pool.

    Parameters
    ----------
    space : DesignSpace
    n : int
        Number of points.
    rng : numpy.random.Generator or int
    pool_size : int
        Candidates drawn from the space to choose from.
    region : (A, b) or (A, b, labels), optional
        Extra inequalities ``A @ x <= b`` (a starting region known to be safe);
        points are drawn from their intersection with the space.
    existing : array of shape (n_existing, n_factors), optional
        Points already in the design; new points keep away from them.

    Returns
    -------
    ndarray of shape (n, n_factors)

    Notes
    -----
    Distances are Euclidean in unit-scaled coordinates over the free factors
    of the (restricted) space. Without ``existing`` the first point is the
    pool point nearest the Chebyshev centre; every next one is the pool
    point farthest from all chosen so far. Discrete factors come from the
    sampler, so they are on feasible levels.
    """
    n = _check_count(n, "n")
    pool_size = _check_count(pool_size, "pool_size")
    if n > pool_size:
        raise ValueError(f"n ({n}) cannot exceed pool_size ({pool_size})")
    rng = np.random.default_rng(rng)
    inner = _restrict(space, region)
    chk = inner.check()
    if chk.empty:
        raise ProtocolError(chk.message)
    pool = inner.sample(pool_size, rng=rng)
    free = inner.free
    U = inner.to_unit(pool)[:, free]
    if existing is not None:
        E = inner.to_unit(np.atleast_2d(np.asarray(existing, dtype=float)))[:, free]
        idx = _farthest_points(U, n, existing=E)
    else:
        c = inner.to_unit(chk.centre)[0, free]
        start = int(np.argmin(np.sum((U - c) ** 2, axis=1)))
        idx = _farthest_points(U, n, start=start)
    return pool[idx]


def starting_design(space: DesignSpace, n: int, *, rng, mixture_indices=None,
                    region=None) -> tuple[np.ndarray, tuple[str, ...]]:
    """A sensible first design for a campaign with no runs.

    Parameters
    ----------
    space : DesignSpace
    n : int
    rng : numpy.random.Generator or int
    mixture_indices : sequence of int, optional
        Mixture components; default: the largest mixture total among the
        equality rows (see :func:`mixture_rows`).
    region : (A, b) or (A, b, labels), optional
        Starting region, as in :func:`maximin`.

    Returns
    -------
    X : ndarray of shape (n, n_factors)
    labels : tuple of str

    Notes
    -----
    When the space is dominated by a mixture (at most
    MAX_OTHER_FREE_FACTORS free factors outside it) and the simplex-centroid
    design in pseudo-components, after dropping points outside the space,
    fits in ``n``, those points come first: they are the classical
    screening runs for a mixture and each has a readable meaning. The
    remaining points are chosen by greedy maximin, away from the centroid
    points. Otherwise every point is chosen by maximin.
    """
    n = _check_count(n, "n")
    rng = np.random.default_rng(rng)
    inner = _restrict(space, region)
    chk = inner.check()
    if chk.empty:
        raise ProtocolError(chk.message)
    if mixture_indices is None:
        rows = mixture_rows(inner)
        mixture = max(rows, key=lambda r: r[0].size)[0] if rows else None
    else:
        mixture = np.asarray(mixture_indices, dtype=int).reshape(-1)
    if mixture is not None:
        others = np.setdiff1d(np.flatnonzero(inner.free), mixture)
        if others.size <= MAX_OTHER_FREE_FACTORS:
            design = mixture_design(inner, mixture, kind=MixtureKind.CENTROID)
            k = design.X.shape[0]
            if 0 < k <= n:
                if k == n:
                    return design.X, design.labels
                rest = maximin(inner, n - k, rng=rng, existing=design.X)
                labels = design.labels + tuple(f"space-filling {i + 1}" for i in range(n - k))
                return np.vstack([design.X, rest]), labels
    X = maximin(inner, n, rng=rng)
    return X, tuple(f"space-filling {i + 1}" for i in range(n))
