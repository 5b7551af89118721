"""Slices of the design space in walk coordinates, and their interior points.

A slice is the polytope with some columns held at fixed values (factors
whose reachable range is ~0, and discrete factors at one level combination).
:class:`SliceFamily` finds a slice's Chebyshev centre (the interior point
every hit-and-run chain starts from), turns inequalities that hold with
equality everywhere into equalities, and rounds a thin slice by its largest
inscribed ellipsoid; :class:`Slice` maps walk coordinates back to factors.

Coordinates. Every free factor is scaled by its reachable range to [0, 1]; the
Chebyshev radius and the walk live in those unit-scaled coordinates,
restricted to the affine hull of the equalities. A uniform distribution is
preserved by this affine change of variables.
"""

from __future__ import annotations

import warnings
from typing import TYPE_CHECKING

import numpy as np
from scipy.linalg import null_space

from guardband.planner.settings import FEASIBILITY_TOL
from guardband.planner.space.arrays import read_only
from guardband.planner.space.lp import FEASIBLE, chebyshev_lp, nearest_centre_lp, solve_lp, support_lp

if TYPE_CHECKING:
    from guardband.planner.space.polytope import DesignSpace

__all__ = ["Slice", "SliceFamily", "finish", "FLAT_RADIUS_TOL", "ROUNDING_RADIUS", "RANK_RCOND"]

#: Chebyshev radius (unit-scaled) below which the polytope is treated as flat and
#: inequalities that hold with equality everywhere are added to the affine hull.
FLAT_RADIUS_TOL = 1e-9
#: A slice whose Chebyshev radius is below ROUNDING_RADIUS / (dim + 1) (unit-scaled,
#: each free factor spanning [0, 1]) is walked in inscribed-ellipsoid coordinates.
ROUNDING_RADIUS = 0.2
#: Rank tolerance (relative) for null spaces of equality systems.
RANK_RCOND = 1e-10


class Slice:
    """A polytope slice in walk coordinates.

    Points are ``x = base`` on fixed columns and
    ``x[free] = base[free] + width * (M @ s)`` on free columns, with
    ``G @ s <= h``; ``s = 0`` is an interior start point. ``M`` spans the
    affine hull of the equalities (unit-scaled) and ``P`` maps back onto it.
    """

    def __init__(self, base, free, width, M, P, G, h, radius):
        self.base = read_only(base)
        self.free = free
        self.width = width
        self.M = M
        self.P = P
        self.G = G
        self.h = h
        self.radius = float(radius)

    @property
    def dim(self) -> int:
        return self.M.shape[1]

    def to_x(self, S: np.ndarray) -> np.ndarray:
        """Map walk coordinates of shape (n, dim) to factor values (n, n_factors)."""
        if not self.dim:
            return np.repeat(self.base[None, :], S.shape[0], axis=0)
        Z = S @ (self.M.T * self.width)
        if self.free.size == self.base.size:
            Z += self.base
            return Z
        X = np.repeat(self.base[None, :], S.shape[0], axis=0)
        X[:, self.free] += Z
        return X

    def to_s(self, X: np.ndarray) -> np.ndarray:
        """Walk coordinates of the (unit-scaled) projection of X onto the affine hull."""
        Z = (X[:, self.free] - self.base[self.free]) / self.width
        return Z @ self.P.T

    def pull_in(self, S: np.ndarray) -> np.ndarray:
        """Shrink each point towards the start point until every inequality holds."""
        if not self.dim or not self.G.shape[0]:
            return S
        GS = S @ self.G.T
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.where(GS > self.h, self.h / GS, np.inf)
        shrink = np.clip(np.min(ratio, axis=1), 0.0, 1.0)
        shrink = np.where(np.isfinite(shrink), shrink, 1.0)
        return S * shrink[:, None]


def _inscribed_ellipsoid(G: np.ndarray, h: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
    """Maximum-volume ellipsoid {c + B u : ||u|| <= 1} inside {t : G t <= h}.

    Boyd & Vandenberghe (2004), Convex Optimization, section 8.4.2:
    maximise log det B subject to ||B g_i|| + g_i^T c <= h_i.
    Returns (B, c) or None if the solver fails.
    """
    import cvxpy as cp  # here: only a thin slice needs it

    k = G.shape[1]
    B, c = cp.Variable((k, k), PSD=True), cp.Variable(k)
    prob = cp.Problem(cp.Maximize(cp.log_det(B)),
                      [cp.norm(G @ B, 2, axis=1) + G @ c <= h])
    try:
        with warnings.catch_warnings():  # an inaccurate ellipsoid is still usable: checked below
            warnings.simplefilter("ignore", UserWarning)
            prob.solve(solver="CLARABEL")
    except cp.error.SolverError:
        return None
    if prob.status not in FEASIBLE or B.value is None:
        return None
    Bv = 0.5 * (B.value + B.value.T)
    if np.min(np.linalg.eigvalsh(Bv)) <= 0 or not np.all(G @ c.value < h + FEASIBILITY_TOL):
        return None
    return Bv, np.asarray(c.value, dtype=float)


class SliceFamily:
    """Slices that share free columns and differ only by the values of the fixed ones.

    The constraint matrices are built once; each slice changes only the
    right-hand sides, and costs two small LPs (:mod:`.lp`).
    """

    def __init__(self, space: DesignSpace, fixed: np.ndarray, lo: np.ndarray,
                 width: np.ndarray, blo: np.ndarray, bhi: np.ndarray,
                 eq_rows: np.ndarray | None = None, ub_rows: np.ndarray | None = None):
        self.space = space
        self.fixed = fixed
        self.free = np.flatnonzero(~fixed)
        F = self.free
        self.lo = lo[F]
        self.width = width[F]
        f = F.size
        # Rows taken into account (default all); the others are checked elsewhere.
        self.eq_rows = np.ones(space.A_eq.shape[0], bool) if eq_rows is None else eq_rows
        self.ub_rows = np.ones(space.A_ub.shape[0], bool) if ub_rows is None else ub_rows
        A_eq, A_ub = space.A_eq[self.eq_rows], space.A_ub[self.ub_rows]
        # Unit-scaled coordinates z: x[F] = lo + width * z.
        self.E = A_eq[:, F] * self.width
        self.C = np.vstack([A_ub[:, F] * self.width, np.eye(f), -np.eye(f)])
        self._d_box = np.concatenate([(bhi[F] - self.lo) / self.width,
                                      -(blo[F] - self.lo) / self.width])
        if f == 0:
            self.N = np.zeros((0, 0))
        elif self.E.shape[0]:
            self.N = null_space(self.E, rcond=RANK_RCOND)
        else:
            self.N = np.eye(f)
        G = self.C @ self.N
        norms = np.linalg.norm(G, axis=1)
        self.keep = norms > 1e-12 * max(1.0, float(norms.max(initial=0.0)))
        self.G = G[self.keep]
        self.gnorm = norms[self.keep]

    def _rhs(self, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Right-hand sides (e, d) of E z = e and C z <= d for fixed values ``v``."""
        s = self.space
        F, nf = self.free, self.fixed
        A_eq, b_eq = s.A_eq[self.eq_rows], s.b_eq[self.eq_rows]
        A_ub, b_ub = s.A_ub[self.ub_rows], s.b_ub[self.ub_rows]
        e = b_eq - A_eq[:, F] @ self.lo - A_eq[:, nf] @ v[nf]
        d_ub = b_ub - A_ub[:, F] @ self.lo - A_ub[:, nf] @ v[nf]
        return e, np.concatenate([d_ub, self._d_box])

    def _chebyshev(self, G, gnorm, h, t_mid) -> tuple[np.ndarray, float]:
        """Chebyshev centre of {t : G t <= h}: maximise r s.t. G t + r ||g|| <= h, r <= 1.

        The problem is feasible for any h (r may be negative: the slice is
        then empty). The maximiser is rarely unique, so a second LP picks,
        among centres of balls of (almost) the largest radius, the one
        nearest (L1) to ``t_mid``, the middle of the factor ranges.
        """
        k = G.shape[1]
        what = "the centre of the design space"
        found = solve_lp(chebyshev_lp(G, gnorm, h), what=what, fallback=lambda: _chebyshev_problem(G, gnorm, h))
        if found.status not in FEASIBLE:
            return np.zeros(k), -np.inf
        t_c, radius = np.asarray(found.x[1:], dtype=float).reshape(k), float(found.x[0])
        if radius <= FLAT_RADIUS_TOL:
            return t_c, radius
        r_use = radius * (1.0 - 1e-6)
        hh = h - r_use * gnorm
        found = solve_lp(nearest_centre_lp(G, hh, t_mid), what=what,
                         fallback=lambda: _nearest_centre_problem(G, hh, t_mid))
        if found.status in FEASIBLE:
            t_c = np.asarray(found.x[k:], dtype=float).reshape(k)
            with np.errstate(over="ignore"):  # a huge slack over a tiny norm is +inf: no bound
                radius = min(radius, float(np.min((h - G @ t_c) / gnorm)))
        return t_c, radius

    def build(self, v: np.ndarray) -> Slice | None:
        """The slice with fixed columns at ``v`` (shape (n_factors,)), or None if empty."""
        e, dvec = self._rhs(v)
        E, C, N = self.E, self.C, self.N
        G, gnorm, keep = self.G, self.gnorm, self.keep
        rtol = FEASIBILITY_TOL
        n_rounds = 4  # rounds of implicit-equality detection for flat polytopes
        for attempt in range(n_rounds):
            if E.shape[0] and E.shape[1]:
                z0 = np.linalg.lstsq(E, e, rcond=None)[0]
            else:
                z0 = np.zeros(E.shape[1])
            if E.shape[0] and np.max(np.abs(E @ z0 - e)) > rtol * max(1.0, np.max(np.abs(e))):
                return None
            h_all = dvec - C @ z0
            if np.any(h_all[~keep] < -FEASIBILITY_TOL):
                return None
            h = h_all[keep]
            k = N.shape[1]
            if k == 0:
                t_c, radius = np.zeros(0), 0.0
                break
            t_mid = N.T @ (0.5 - z0)  # middle of the unit-scaled ranges, in t
            t_c, radius = self._chebyshev(G, gnorm, h, t_mid)
            if radius < -FEASIBILITY_TOL:
                return None
            if radius >= FLAT_RADIUS_TOL or attempt == n_rounds - 1:
                break
            # Flat polytope: inequalities whose slack is zero everywhere join the
            # equalities, so that the walk moves within the flat.
            tight = _tight_rows(G, h)
            if not tight.any():
                break
            rows = np.flatnonzero(keep)[tight]
            E = np.vstack([E, C[rows]])
            e = np.concatenate([e, dvec[rows]])
            N = null_space(E, rcond=RANK_RCOND)
            G_all = C @ N
            norms = np.linalg.norm(G_all, axis=1)
            keep = norms > 1e-12 * max(1.0, float(norms.max(initial=0.0)))
            G, gnorm = G_all[keep], norms[keep]
            rtol = 10 * FEASIBILITY_TOL
        k = N.shape[1]
        z_c = z0 + N @ t_c if k else z0
        slack = np.maximum(h - G @ t_c, 0.0) if k else h
        M, P, Gw = N, N.T, G
        if k and 0.0 < radius < ROUNDING_RADIUS / (k + 1):
            # Thin slice: walk in the coordinates of the largest inscribed
            # ellipsoid (an affine map, so uniformity is kept) to restore mixing.
            found = _inscribed_ellipsoid(G, slack)
            if found is not None:
                B, c = found
                z_c = z_c + N @ c
                slack = np.maximum(slack - G @ c, 0.0)
                M, P, Gw = N @ B, np.linalg.solve(B, N.T), G @ B
        base = v.astype(float).copy()
        base[self.free] = self.lo + self.width * z_c
        return Slice(base, self.free, self.width, M, P, Gw, slack, max(radius, 0.0))


def _tight_rows(G: np.ndarray, h: np.ndarray) -> np.ndarray:
    """Rows i of G t <= h whose largest slack over the (slightly relaxed) polytope is ~0."""
    tight = np.zeros(G.shape[0], dtype=bool)
    h_relaxed = h + FEASIBILITY_TOL
    for i in range(G.shape[0]):
        found = solve_lp(support_lp(G[i], G, h_relaxed), what="the flat directions of the design space",
                         fallback=lambda i=i: _support_problem(G[i], G, h_relaxed))
        if found.status in FEASIBLE:
            tight[i] = h[i] - found.value <= 2 * FEASIBILITY_TOL
    return tight


# The cvxpy problems whose layouts :mod:`.lp` reproduces (written as they were solved
# before, right-hand sides as parameters): CLARABEL solves them when HiGHS cannot
# settle an LP, and the tests compare the layouts with them. Each returns the
# problem and how to read its solution in the LP's variable order.
def _chebyshev_problem(G, gnorm, h):
    import cvxpy as cp

    t, r, hp = cp.Variable(G.shape[1]), cp.Variable(), cp.Parameter(G.shape[0])
    prob = cp.Problem(cp.Maximize(r), [G @ t + r * gnorm <= hp, r <= 1.0])
    hp.value = h
    return prob, lambda: np.concatenate([np.reshape(r.value, 1), t.value])


def _nearest_centre_problem(G, hh, t_mid):
    import cvxpy as cp

    t2, hhp, tm = cp.Variable(G.shape[1]), cp.Parameter(G.shape[0]), cp.Parameter(G.shape[1])
    prob = cp.Problem(cp.Minimize(cp.norm1(t2 - tm)), [G @ t2 <= hhp])
    hhp.value, tm.value = hh, t_mid
    # the norm's auxiliary variables are |t - t_mid| at the optimum
    return prob, lambda: np.concatenate([np.abs(t2.value - t_mid), t2.value])


def _support_problem(c, G, h):
    import cvxpy as cp

    t, cp_c = cp.Variable(G.shape[1]), cp.Parameter(G.shape[1])
    prob = cp.Problem(cp.Minimize(cp_c @ t), [G @ t <= h])
    cp_c.value = c
    return prob, lambda: np.asarray(t.value, dtype=float)


def finish(space: DesignSpace, sl: Slice, X: np.ndarray,
           discrete: np.ndarray | None) -> np.ndarray:
    """Exact values on fixed and discrete columns; clip rounding-level box excursions.

    Parameters
    ----------
    space : DesignSpace
    sl : Slice
        The slice the rows of ``X`` come from.
    X : array of shape (n, n_factors)
        Changed in place and returned.
    discrete : array of shape (n, n_discrete), optional
        The level combination of each row.
    """
    lo, hi = space._relaxed_bounds
    F = sl.free
    if F.size == space.n_factors:
        np.clip(X, lo, hi, out=X)
    else:
        fixed = np.setdiff1d(np.arange(space.n_factors), F)
        X[:, fixed] = sl.base[fixed]
        X[:, F] = np.clip(X[:, F], lo[F], hi[F])
    if discrete is not None:
        X[:, space._discrete] = discrete
    return X
