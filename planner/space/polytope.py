"""The design space: a polytope (box, linear equalities and inequalities) plus discrete levels.

A :class:`DesignSpace` is built from arrays (the protocol module builds one from
a protocol file). It answers, with cvxpy linear programs, whether the space is
empty and which constraints conflict, what range each factor can really take
and where its centre is; it tests membership, names the rule a point breaks,
projects a point onto the space, scales factors to the unit cube, and draws
candidates uniformly by hit-and-run (Smith 1984), which stays inside the
polytope however thin it is.

Solvers. Linear and mixed-integer programs go through cvxpy's ``SCIPY``
interface (scipy's bundled HiGHS: vertex-exact simplex solutions, and silent;
cvxpy's ``HIGHS`` interface makes the installed highspy print a banner on
stdout, which would corrupt machine-readable output). The projection QP uses
``CLARABEL``. Both ship with cvxpy.

Coordinates. Internally every free factor is scaled by its real range (from
:meth:`DesignSpace.check`) to [0, 1]; the Chebyshev radius and the
hit-and-run walk live in those unit-scaled coordinates, restricted to the
affine hull of the equalities. A uniform distribution is preserved by this
affine change of variables.
"""

from __future__ import annotations

import itertools
import math
import types
import warnings
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any, Mapping

import cvxpy as cp
import numpy as np
from scipy.linalg import null_space

from guardband.planner.errors import ProtocolError
from guardband.planner.models import blas_limit
from guardband.planner.settings import (
    FEASIBILITY_TOL,
    FIXED_RANGE_TOL,
    HIT_AND_RUN_BURN_IN,
    HIT_AND_RUN_THIN,
)

__all__ = [
    "DesignSpace",
    "SpaceCheck",
    "LP_SOLVER",
    "QP_SOLVER",
    "MAX_ENUMERATED_COMBINATIONS",
]

#: cvxpy solver for linear and mixed-integer feasibility problems.
LP_SOLVER = "SCIPY"
#: cvxpy solver for the projection quadratic programme.
QP_SOLVER = "CLARABEL"
#: Level combinations are enumerated (and each checked with an LP) up to this count.
MAX_ENUMERATED_COMBINATIONS = 10_000
#: Combinations drawn at random when there are more than MAX_ENUMERATED_COMBINATIONS.
N_SAMPLED_COMBINATIONS = 2_000
#: Chebyshev radius (unit-scaled) below which the polytope is treated as flat and
#: inequalities that hold with equality everywhere are added to the affine hull.
FLAT_RADIUS_TOL = 1e-9
#: A slice whose Chebyshev radius is below ROUNDING_RADIUS / (dim + 1) (unit-scaled,
#: each free factor spanning [0, 1]) is walked in inscribed-ellipsoid coordinates.
ROUNDING_RADIUS = 0.2
#: Chains run in parallel by default (one matrix product per step for all of them).
DEFAULT_N_CHAINS = 1024
#: Slacks of the walk are recomputed from scratch every this many steps (stops drift).
SLACK_REFRESH = 50
#: Rank tolerance (relative) for null spaces of equality systems.
RANK_RCOND = 1e-10

_FEASIBLE = (cp.OPTIMAL, cp.OPTIMAL_INACCURATE)
_INFEASIBLE = (cp.INFEASIBLE, cp.INFEASIBLE_INACCURATE)


def _jsonable(value: Any) -> Any:
    """Turn numpy values (NaN -> None) into plain JSON-able Python objects."""
    if isinstance(value, np.ndarray):
        return [_jsonable(v) for v in value.tolist()]
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, (float, np.floating)):
        value = float(value)
        return None if not math.isfinite(value) else value
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.bool_):
        return bool(value)
    return value


def _frozen(array: np.ndarray) -> np.ndarray:
    array.setflags(write=False)
    return array


@dataclass(frozen=True)
class SpaceCheck:
    """What :meth:`DesignSpace.check` found.

    Attributes
    ----------
    empty : bool
        True when no point satisfies every constraint (and, with discrete
        factors, no combination of levels is feasible).
    conflicts : tuple of str
        Labels of the constraint groups that conflict (empty when feasible).
    ranges : ndarray of shape (n_factors, 2)
        Real minimum and maximum of each factor over the space (discrete
        factors relaxed to their level range); NaN when empty.
    centre : ndarray of shape (n_factors,)
        Chebyshev centre in the affine hull of the equalities (discrete
        factors relaxed, so they may sit between levels); NaN when empty.
    radius : float
        Chebyshev radius in unit-scaled coordinates; NaN when empty.
    message : str
        A plain sentence for the user.
    dimension : int
        Dimension of the space (free directions), -1 when empty.
    """

    empty: bool
    conflicts: tuple[str, ...]
    ranges: np.ndarray
    centre: np.ndarray
    radius: float
    message: str
    dimension: int = -1

    def to_dict(self) -> dict:
        """Plain JSON-able dictionary (NaN becomes None)."""
        return {
            "empty": bool(self.empty),
            "conflicts": list(self.conflicts),
            "ranges": _jsonable(self.ranges),
            "centre": _jsonable(self.centre),
            "radius": _jsonable(self.radius),
            "message": self.message,
            "dimension": int(self.dimension),
        }


@dataclass(frozen=True)
class _Group:
    """One constraint group: the unit that conflict reports name."""

    label: str
    kind: str  # "bounds", "levels", "eq", "ub"
    index: int


class _Slice:
    """A polytope slice in walk coordinates.

    Points are ``x = base`` on fixed columns and
    ``x[free] = base[free] + width * (M @ s)`` on free columns, with
    ``G @ s <= h``; ``s = 0`` is an interior start point. ``M`` spans the
    affine hull of the equalities (unit-scaled) and ``P`` maps back onto it.
    """

    def __init__(self, base, free, width, M, P, G, h, radius):
        self.base = _frozen(base)
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
    if prob.status not in _FEASIBLE or B.value is None:
        return None
    Bv = 0.5 * (B.value + B.value.T)
    if np.min(np.linalg.eigvalsh(Bv)) <= 0 or not np.all(G @ c.value < h + FEASIBILITY_TOL):
        return None
    return Bv, np.asarray(c.value, dtype=float)


class _SliceFamily:
    """Slices that share free columns and differ only by the values of the fixed ones.

    The Chebyshev LP is compiled once (cvxpy DPP) with the right-hand side as a
    parameter, so each slice costs one re-solve.
    """

    def __init__(self, space: "DesignSpace", fixed: np.ndarray, lo: np.ndarray,
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
        self._lp = None

    def _rhs(self, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Right-hand sides (e, d) of E z = e and C z <= d for fixed values ``v``."""
        s = self.space
        F, nf = self.free, self.fixed
        A_eq, b_eq = s.A_eq[self.eq_rows], s.b_eq[self.eq_rows]
        A_ub, b_ub = s.A_ub[self.ub_rows], s.b_ub[self.ub_rows]
        e = b_eq - A_eq[:, F] @ self.lo - A_eq[:, nf] @ v[nf]
        d_ub = b_ub - A_ub[:, F] @ self.lo - A_ub[:, nf] @ v[nf]
        return e, np.concatenate([d_ub, self._d_box])

    def _chebyshev(self, G, gnorm, h, t_mid, *, cached: bool) -> tuple[np.ndarray, float]:
        """Chebyshev centre of {t : G t <= h}: maximise r s.t. G t + r ||g|| <= h, r <= 1.

        The problem is feasible for any h (r may be negative: the slice is
        then empty). The maximiser is rarely unique, so a second LP picks,
        among centres of balls of (almost) the largest radius, the one
        nearest (L1) to ``t_mid``, the middle of the factor ranges.
        """
        k, m = G.shape[1], G.shape[0]
        if cached and self._lp is not None:
            first, second = self._lp
        else:
            t, r, hp = cp.Variable(k), cp.Variable(), cp.Parameter(m)
            first = (cp.Problem(cp.Maximize(r), [G @ t + r * gnorm <= hp, r <= 1.0]), t, r, hp)
            t2, hh, tm = cp.Variable(k), cp.Parameter(m), cp.Parameter(k)
            second = (cp.Problem(cp.Minimize(cp.norm1(t2 - tm)), [G @ t2 <= hh]), t2, hh, tm)
            if cached:
                self._lp = (first, second)
        prob, t, r, hp = first
        hp.value = h
        _solve(prob, what="the centre of the design space")
        if prob.status not in _FEASIBLE:
            return np.zeros(k), -np.inf
        t_c, radius = np.asarray(t.value, dtype=float).reshape(k), float(r.value)
        if radius <= FLAT_RADIUS_TOL:
            return t_c, radius
        prob, t2, hh, tm = second
        r_use = radius * (1.0 - 1e-6)
        hh.value = h - r_use * gnorm
        tm.value = t_mid
        _solve(prob, what="the centre of the design space")
        if prob.status in _FEASIBLE:
            t_c = np.asarray(t2.value, dtype=float).reshape(k)
            with np.errstate(over="ignore"):  # a huge slack over a tiny norm is +inf: no bound
                radius = min(radius, float(np.min((h - G @ t_c) / gnorm)))
        return t_c, radius

    def build(self, v: np.ndarray) -> _Slice | None:
        """The slice with fixed columns at ``v`` (shape (n_factors,)), or None if empty."""
        e, dvec = self._rhs(v)
        E, C, N = self.E, self.C, self.N
        G, gnorm, keep = self.G, self.gnorm, self.keep
        cached, rtol = True, FEASIBILITY_TOL
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
            t_c, radius = self._chebyshev(G, gnorm, h, t_mid, cached=cached)
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
            cached, rtol = False, 10 * FEASIBILITY_TOL
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
        return _Slice(base, self.free, self.width, M, P, Gw, slack, max(radius, 0.0))


def _tight_rows(G: np.ndarray, h: np.ndarray) -> np.ndarray:
    """Rows i of G t <= h whose largest slack over the (slightly relaxed) polytope is ~0."""
    k = G.shape[1]
    t, c = cp.Variable(k), cp.Parameter(k)
    prob = cp.Problem(cp.Minimize(c @ t), [G @ t <= h + FEASIBILITY_TOL])
    tight = np.zeros(G.shape[0], dtype=bool)
    for i in range(G.shape[0]):
        c.value = G[i]
        _solve(prob, what="the flat directions of the design space")
        if prob.status in _FEASIBLE:
            tight[i] = h[i] - prob.value <= 2 * FEASIBILITY_TOL
    return tight


def _solve(prob: cp.Problem, *, what: str, solver: str = LP_SOLVER) -> None:
    """Solve with the named solver, falling back to CLARABEL; raise if undecided."""
    for name in (solver, "CLARABEL"):
        try:
            prob.solve(solver=name)
        except cp.error.SolverError:
            continue
        if prob.status in _FEASIBLE or prob.status in _INFEASIBLE:
            return
    raise ProtocolError(
        f"the solver could not settle {what} (status {prob.status!r}); check the "
        "constraints for very large or very small coefficients"
    )


@dataclass(frozen=True, eq=False)
class DesignSpace:
    """A polytope of factor settings with optional discrete levels.

    Parameters
    ----------
    names : tuple of str
        Factor names; their order is the column order.
    lower, upper : array of shape (n_factors,)
        Box bounds; ``lower[j] == upper[j]`` fixes factor j.
    A_eq : array of shape (m_eq, n_factors), optional
        Equality rows, ``A_eq @ x == b_eq`` (e.g. a mixture total).
    b_eq : array of shape (m_eq,), optional
    A_ub : array of shape (m_ub, n_factors), optional
        Inequality rows, ``A_ub @ x <= b_ub`` (ratio limits, linearised).
    b_ub : array of shape (m_ub,), optional
    eq_labels, ub_labels : tuple of str, optional
        A label per row, used in messages; default "equality i" / "inequality i".
    levels : dict of int to array, optional
        Factor index -> allowed values of a discrete factor.
    units : tuple of str, optional
        Unit of each factor (default "").

    Notes
    -----
    Arrays are copied and made read-only. Results of :meth:`check` and the
    walk geometry are computed once, on first use, and cached.
    """

    names: tuple[str, ...]
    lower: np.ndarray
    upper: np.ndarray
    A_eq: np.ndarray | None = None
    b_eq: np.ndarray | None = None
    A_ub: np.ndarray | None = None
    b_ub: np.ndarray | None = None
    eq_labels: tuple[str, ...] | None = None
    ub_labels: tuple[str, ...] | None = None
    levels: Mapping[int, np.ndarray] = field(default_factory=dict)
    units: tuple[str, ...] | None = None

    def __post_init__(self) -> None:
        setattr_ = object.__setattr__
        names = tuple(str(n) for n in self.names)
        d = len(names)
        if d == 0:
            raise ValueError("a design space needs at least one factor")
        if len(set(names)) != d:
            raise ValueError(f"factor names must be unique, got {names}")
        setattr_(self, "names", names)

        def vector(value, what, size):
            arr = np.array(value, dtype=float, copy=True).reshape(-1) if value is not None \
                else np.zeros(0)
            if arr.shape != (size,):
                raise ValueError(f"{what} must have shape ({size},), got {arr.shape}")
            if not np.all(np.isfinite(arr)):
                raise ValueError(f"{what} must be finite, got {arr}")
            return _frozen(arr)

        def matrix(value, what):
            if value is None:
                return _frozen(np.zeros((0, d)))
            arr = np.array(value, dtype=float, copy=True)
            if arr.ndim == 1 and arr.size == 0:
                arr = arr.reshape(0, d)
            if arr.ndim != 2 or arr.shape[1] != d:
                raise ValueError(f"{what} must have shape (m, {d}), got {arr.shape}")
            if not np.all(np.isfinite(arr)):
                raise ValueError(f"{what} must be finite")
            return _frozen(arr)

        setattr_(self, "lower", vector(self.lower, "lower", d))
        setattr_(self, "upper", vector(self.upper, "upper", d))
        for a_name, b_name, l_name, default in (
            ("A_eq", "b_eq", "eq_labels", "equality"),
            ("A_ub", "b_ub", "ub_labels", "inequality"),
        ):
            A = matrix(getattr(self, a_name), a_name)
            b = vector(getattr(self, b_name), b_name, A.shape[0])
            labels = getattr(self, l_name)
            if labels is None:
                labels = tuple(f"{default} {i + 1}" for i in range(A.shape[0]))
            labels = tuple(str(s) for s in labels)
            if len(labels) != A.shape[0]:
                raise ValueError(f"{l_name} needs {A.shape[0]} labels, got {len(labels)}")
            setattr_(self, a_name, A)
            setattr_(self, b_name, b)
            setattr_(self, l_name, labels)

        levels = {}
        for key, values in dict(self.levels or {}).items():
            j = int(key)
            if not 0 <= j < d:
                raise ValueError(f"levels key {key} is not a factor index (0..{d - 1})")
            arr = np.unique(np.array(values, dtype=float).reshape(-1))
            if arr.size == 0 or not np.all(np.isfinite(arr)):
                raise ValueError(f"levels of {names[j]} must be finite and non-empty")
            levels[j] = _frozen(arr)
        setattr_(self, "levels", types.MappingProxyType(dict(sorted(levels.items()))))

        units = self.units if self.units is not None else ("",) * d
        units = tuple(str(u) for u in units)
        if len(units) != d:
            raise ValueError(f"units needs {d} entries, got {len(units)}")
        setattr_(self, "units", units)
        setattr_(self, "_slice_cache", {})

    # ------------------------------------------------------------------ basics
    @property
    def n_factors(self) -> int:
        """Number of factors (columns)."""
        return len(self.names)

    def index(self, name: str) -> int:
        """Column index of factor ``name``."""
        try:
            return self.names.index(name)
        except ValueError:
            raise ProtocolError(
                f"unknown factor {name!r}; the factors are: {', '.join(self.names)}"
            ) from None

    @cached_property
    def _discrete(self) -> np.ndarray:
        return np.array(sorted(self.levels), dtype=int)

    @cached_property
    def _relaxed_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        """Box bounds intersected with each discrete factor's level range."""
        lo, hi = self.lower.copy(), self.upper.copy()
        for j, lv in self.levels.items():
            lo[j] = max(lo[j], lv[0])
            hi[j] = min(hi[j], lv[-1])
        return lo, hi

    @cached_property
    def groups(self) -> tuple[_Group, ...]:
        """Constraint groups in reporting order: bounds, levels, equalities, inequalities."""
        out = [_Group(f"bounds of {n}", "bounds", j) for j, n in enumerate(self.names)]
        out += [_Group(f"levels of {self.names[j]}", "levels", j) for j in self.levels]
        out += [_Group(lab, "eq", i) for i, lab in enumerate(self.eq_labels)]
        out += [_Group(lab, "ub", i) for i, lab in enumerate(self.ub_labels)]
        return tuple(out)

    @property
    def group_labels(self) -> tuple[str, ...]:
        """Label of each column of :meth:`violations`."""
        return tuple(g.label for g in self.groups)

    def add_inequalities(self, A_ub, b_ub, labels=None) -> "DesignSpace":
        """A new space with extra rows ``A_ub @ x <= b_ub`` appended.

        Parameters
        ----------
        A_ub : array of shape (m, n_factors)
        b_ub : array of shape (m,)
        labels : sequence of str, optional
        """
        A = np.atleast_2d(np.asarray(A_ub, dtype=float))
        b = np.atleast_1d(np.asarray(b_ub, dtype=float))
        if labels is None:
            labels = [f"extra inequality {i + 1}" for i in range(A.shape[0])]
        return DesignSpace(
            self.names, self.lower, self.upper, self.A_eq, self.b_eq,
            np.vstack([self.A_ub, A]), np.concatenate([self.b_ub, b]),
            self.eq_labels, self.ub_labels + tuple(labels), dict(self.levels), self.units,
        )

    # ------------------------------------------------------------ membership
    def _as_points(self, X) -> np.ndarray:
        X = np.asarray(X, dtype=float)
        if X.ndim == 1:
            X = X[None, :]
        if X.ndim != 2 or X.shape[1] != self.n_factors:
            raise ValueError(f"points must have shape (n, {self.n_factors}), got {X.shape}")
        return X

    def violations(self, X) -> np.ndarray:
        """Amount by which each point breaks each constraint group.

        Parameters
        ----------
        X : array of shape (n, n_factors)

        Returns
        -------
        ndarray of shape (n, n_groups)
            Non-negative, in protocol units; columns follow :attr:`group_labels`.
        """
        X = self._as_points(X)
        cols = [np.maximum(np.maximum(self.lower - X, X - self.upper), 0.0)]
        for j, lv in self.levels.items():
            cols.append(np.min(np.abs(X[:, j, None] - lv[None, :]), axis=1)[:, None])
        cols.append(np.abs(X @ self.A_eq.T - self.b_eq))
        cols.append(np.maximum(X @ self.A_ub.T - self.b_ub, 0.0))
        return np.hstack(cols)

    @cached_property
    def _tol_scale(self) -> np.ndarray:
        """Per-group multiplier of the tolerance: max(1, magnitude of the rule)."""
        s = [np.maximum(1.0, np.maximum(np.abs(self.lower), np.abs(self.upper)))]
        s.append(np.array([max(1.0, float(np.max(np.abs(lv)))) for lv in self.levels.values()]))
        for A, b in ((self.A_eq, self.b_eq), (self.A_ub, self.b_ub)):
            s.append(np.maximum(1.0, np.maximum(np.abs(b), np.max(np.abs(A), axis=1, initial=0.0))))
        return _frozen(np.concatenate(s))

    def contains(self, X, *, tol: float = FEASIBILITY_TOL) -> np.ndarray:
        """Whether each point lies in the design space.

        Parameters
        ----------
        X : array of shape (n, n_factors) or (n_factors,)
        tol : float
            Absolute tolerance, multiplied for each rule by max(1, its magnitude).

        Returns
        -------
        ndarray of bool, shape (n,)
        """
        X = self._as_points(X)
        s = tol * self._tol_scale
        d, n_l, m_eq = self.n_factors, len(self.levels), self.A_eq.shape[0]
        ok = np.all(X >= self.lower - s[:d], axis=1)
        ok &= np.all(X <= self.upper + s[:d], axis=1)
        for k, (j, lv) in enumerate(self.levels.items()):
            ok &= np.min(np.abs(X[:, j, None] - lv[None, :]), axis=1) <= s[d + k]
        if m_eq:
            ok &= np.all(np.abs(X @ self.A_eq.T - self.b_eq) <= s[d + n_l: d + n_l + m_eq], axis=1)
        if self.A_ub.shape[0]:
            ok &= np.all(X @ self.A_ub.T - self.b_ub <= s[d + n_l + m_eq:], axis=1)
        return ok

    def describe_violation(self, x, *, tol: float = FEASIBILITY_TOL) -> str:
        """Name the first constraint a point breaks, or return "" if it breaks none.

        Parameters
        ----------
        x : array of shape (n_factors,)
        """
        x = self._as_points(x)
        if x.shape[0] != 1:
            raise ValueError("describe_violation takes a single point")
        v = self.violations(x)[0]
        bad = np.flatnonzero(v > tol * self._tol_scale)
        if bad.size == 0:
            return ""
        g = self.groups[bad[0]]
        x = x[0]
        if g.kind == "bounds":
            j = g.index
            side = f"below the lower bound {self.lower[j]:.6g}" if x[j] < self.lower[j] \
                else f"above the upper bound {self.upper[j]:.6g}"
            return f"{g.label}: {self.names[j]} = {x[j]:.6g} is {side}"
        if g.kind == "levels":
            j, lv = g.index, self.levels[g.index]
            return (f"{g.label}: {self.names[j]} = {x[j]:.6g} is not an allowed level "
                    f"({', '.join(f'{a:.6g}' for a in lv)})")
        if g.kind == "eq":
            value = float(self.A_eq[g.index] @ x)
            return f"{g.label}: value {value:.6g} must equal {self.b_eq[g.index]:.6g}"
        value = float(self.A_ub[g.index] @ x)
        return f"{g.label}: value {value:.6g} exceeds the limit {self.b_ub[g.index]:.6g}"

    # -------------------------------------------------------------- feasibility
    def _feasible(self, active: np.ndarray, *, exact_levels: bool) -> bool:
        """Whether the constraint groups flagged in ``active`` can all hold at once."""
        d = self.n_factors
        x = cp.Variable(d)
        cons = []
        for g, on in zip(self.groups, active):
            if not on:
                continue
            j = g.index
            if g.kind == "bounds":
                cons += [x[j] >= self.lower[j], x[j] <= self.upper[j]]
            elif g.kind == "levels":
                lv = self.levels[j]
                if exact_levels and lv.size > 1:
                    pick = cp.Variable(lv.size, boolean=True)
                    cons += [cp.sum(pick) == 1, x[j] == lv @ pick]
                elif exact_levels:
                    cons.append(x[j] == lv[0])
                else:
                    cons += [x[j] >= lv[0], x[j] <= lv[-1]]
            elif g.kind == "eq":
                cons.append(self.A_eq[j] @ x == self.b_eq[j])
            else:
                cons.append(self.A_ub[j] @ x <= self.b_ub[j])
        if not cons:
            return True
        prob = cp.Problem(cp.Minimize(0), cons)
        _solve(prob, what="whether the design space is empty")
        return prob.status in _FEASIBLE

    def _conflicts(self, *, exact_levels: bool) -> tuple[tuple[str, ...], str]:
        """Constraint groups that conflict, and a sentence saying how they were found."""
        n = len(self.groups)
        full = np.ones(n, dtype=bool)
        singles = []
        for i in range(n):
            trial = full.copy()
            trial[i] = False
            if self._feasible(trial, exact_levels=exact_levels):
                singles.append(self.groups[i].label)
        if singles:
            return tuple(singles), (
                "it becomes non-empty when any one of these is removed or relaxed: "
                + "; ".join(singles)
            )
        # Deletion filter (Chinneck & Dravnieks 1991): drop each group in turn and
        # leave it out while the rest stays infeasible; what is left is an
        # irreducible infeasible subset.
        keep = full.copy()
        for i in range(n):
            keep[i] = False
            if self._feasible(keep, exact_levels=exact_levels):
                keep[i] = True
        iis = tuple(self.groups[i].label for i in np.flatnonzero(keep))
        return iis, (
            "no single constraint explains it; these constraints cannot hold together "
            "(an irreducible set: dropping any one of them removes this conflict): "
            + "; ".join(iis)
        )

    def check(self) -> SpaceCheck:
        """Is the space empty (and why), real factor ranges, and its Chebyshev centre.

        Returns
        -------
        SpaceCheck
        """
        return self._check

    @cached_property
    def _emptiness(self) -> tuple[tuple[str, ...], str] | None:
        """None when feasible, else (conflicting groups, message)."""
        all_on = np.ones(len(self.groups), dtype=bool)
        if not self._feasible(all_on, exact_levels=False):
            conflicts, how = self._conflicts(exact_levels=False)
            return conflicts, f"the design space is empty; {how}"
        if self.levels and not self._feasible(all_on, exact_levels=True):
            conflicts, how = self._conflicts(exact_levels=True)
            return conflicts, f"no combination of the discrete levels is feasible; {how}"
        return None

    @cached_property
    def _geometry(self) -> tuple[np.ndarray, _Slice | None]:
        """Real ranges (n_factors, 2) and the relaxed slice (discrete factors continuous)."""
        ranges = _frozen(self._lp_ranges())
        width = ranges[:, 1] - ranges[:, 0]
        fixed = width < FIXED_RANGE_TOL
        family = _SliceFamily(self, fixed, ranges[:, 0], np.where(fixed, 1.0, width),
                              *self._relaxed_bounds)
        return ranges, family.build(ranges.mean(axis=1))

    @cached_property
    def _check(self) -> SpaceCheck:
        d = self.n_factors
        nan_ranges = _frozen(np.full((d, 2), np.nan))
        nan_centre = _frozen(np.full(d, np.nan))

        def empty(conflicts, message):
            return SpaceCheck(True, tuple(conflicts), nan_ranges, nan_centre,
                              float("nan"), message, -1)

        found = self._emptiness
        if found is not None:
            return empty(*found)
        ranges, sl = self._geometry
        if sl is None:  # only if the LPs disagree with each other at the tolerance
            return empty(self.group_labels, "the design space is too thin to hold a point "
                         f"within the tolerance {FEASIBILITY_TOL:g}")
        n_fixed = int(np.sum(ranges[:, 1] - ranges[:, 0] < FIXED_RANGE_TOL))
        parts = [f"the design space is not empty: {d} factor{'s' * (d != 1)}, {n_fixed} "
                 f"fixed, {sl.dim} free direction{'s' * (sl.dim != 1)}, Chebyshev radius "
                 f"{sl.radius:.3g} (unit-scaled)"]
        if self.levels:
            n_all = self._n_combinations
            if n_all <= MAX_ENUMERATED_COMBINATIONS:
                n_ok = self._enumerated.shape[0]
                if n_ok == 0:
                    return empty([f"levels of {self.names[j]}" for j in self.levels],
                                 "no combination of the discrete levels is feasible; none "
                                 "leaves room for a point within the tolerance "
                                 f"{FEASIBILITY_TOL:g}")
                parts.append(f"{n_ok} of {n_all} combinations of levels are feasible")
            else:
                parts.append(f"{n_all} combinations of levels, at least one feasible")
        return SpaceCheck(False, (), ranges, _frozen(sl.base.copy()), sl.radius,
                          "; ".join(parts), sl.dim)

    def _lp_ranges(self) -> np.ndarray:
        """Minimum and maximum of every factor: two LPs each (discrete relaxed)."""
        d = self.n_factors
        lo, hi = self._relaxed_bounds
        x, c = cp.Variable(d), cp.Parameter(d)
        cons = [x >= lo, x <= hi]
        if self.A_eq.shape[0]:
            cons.append(self.A_eq @ x == self.b_eq)
        if self.A_ub.shape[0]:
            cons.append(self.A_ub @ x <= self.b_ub)
        prob = cp.Problem(cp.Minimize(c @ x), cons)
        ranges = np.empty((d, 2))
        for j in range(d):
            if hi[j] - lo[j] < FIXED_RANGE_TOL:
                ranges[j] = lo[j], hi[j]
                continue
            for side, sign in ((0, 1.0), (1, -1.0)):
                c.value = sign * np.eye(d)[j]
                _solve(prob, what=f"the range of {self.names[j]}")
                ranges[j, side] = x.value[j]
        ranges = np.clip(ranges, lo[:, None], hi[:, None])
        ranges[:, 1] = np.maximum(ranges[:, 1], ranges[:, 0])
        return ranges

    def _require_nonempty(self) -> SpaceCheck:
        chk = self.check()
        if chk.empty:
            raise ProtocolError(chk.message)
        return chk

    # --------------------------------------------------------------- scaling
    @property
    def free(self) -> np.ndarray:
        """Boolean mask of shape (n_factors,): factors whose real range is not ~0."""
        r = self._require_nonempty().ranges
        return (r[:, 1] - r[:, 0]) >= FIXED_RANGE_TOL

    def to_unit(self, X) -> np.ndarray:
        """Scale points to [0, 1] per factor by the real ranges; fixed factors map to 0.5.

        Parameters
        ----------
        X : array of shape (n, n_factors)

        Returns
        -------
        ndarray of shape (n, n_factors)
        """
        X = self._as_points(X)
        r = self._require_nonempty().ranges
        free = self.free
        w = np.where(free, r[:, 1] - r[:, 0], 1.0)
        return np.where(free, (X - r[:, 0]) / w, 0.5)

    def from_unit(self, U) -> np.ndarray:
        """Inverse of :meth:`to_unit`; a fixed factor takes its value.

        Parameters
        ----------
        U : array of shape (n, n_factors)

        Returns
        -------
        ndarray of shape (n, n_factors)
        """
        U = self._as_points(U)
        r = self._require_nonempty().ranges
        free = self.free
        return np.where(free, r[:, 0] + U * (r[:, 1] - r[:, 0]), r.mean(axis=1))

    # ---------------------------------------------------- discrete combinations
    # Discrete factors. Rows of A_eq / A_ub split into "mixed" rows, which touch
    # a free continuous factor and so shape the continuous slice, and the rest,
    # which a level combination meets or not on its own (checked exactly, in
    # bulk). Combinations that shift the mixed rows by the same amounts share
    # one slice: its LP is solved once and cached under that shift.
    @cached_property
    def _discrete_setup(self):
        r = self._geometry[0]
        width = r[:, 1] - r[:, 0]
        fixed = width < FIXED_RANGE_TOL
        fixed[self._discrete] = True
        free = ~fixed
        mixed_eq = np.any(self.A_eq[:, free] != 0, axis=1)
        mixed_ub = np.any(self.A_ub[:, free] != 0, axis=1)
        family = _SliceFamily(self, fixed, r[:, 0], np.where(fixed, 1.0, width),
                              self.lower, self.upper, mixed_eq, mixed_ub)
        return family, fixed, mixed_eq, mixed_ub

    def _candidate_levels(self) -> list[np.ndarray]:
        """Levels of each discrete factor that fall inside its real range."""
        ranges = self._geometry[0]
        out = []
        for j in self._discrete:
            lv = self.levels[j]
            tol = FEASIBILITY_TOL * max(1.0, float(np.max(np.abs(lv))))
            out.append(lv[(lv >= ranges[j, 0] - tol) & (lv <= ranges[j, 1] + tol)])
        return out

    def _combination_points(self, V: np.ndarray) -> np.ndarray:
        """Relaxed centre with the discrete columns set to each combination, (n, n_factors)."""
        X = np.repeat(self._geometry[1].base[None, :], V.shape[0], axis=0)
        X[:, self._discrete] = V
        return X

    def _shift_key(self, V: np.ndarray) -> np.ndarray:
        """How each combination (n, n_discrete) shifts the mixed rows, (n, n_mixed)."""
        _, _, mixed_eq, mixed_ub = self._discrete_setup
        D = self._discrete
        return np.hstack([V @ self.A_eq[mixed_eq][:, D].T, V @ self.A_ub[mixed_ub][:, D].T])

    def _feasible_combinations(self, V: np.ndarray) -> np.ndarray:
        """Which combinations (rows of V, shape (n, n_discrete)) admit a point."""
        family, fixed, mixed_eq, mixed_ub = self._discrete_setup
        X = self._combination_points(V)
        ok = np.ones(V.shape[0], dtype=bool)
        scale = FEASIBILITY_TOL * self._tol_scale
        n_b, n_l = self.n_factors, len(self.levels)
        eq_scale = scale[n_b + n_l: n_b + n_l + self.A_eq.shape[0]]
        ub_scale = scale[n_b + n_l + self.A_eq.shape[0]:]
        # Rows that only involve discrete and fixed factors: exact test.
        if (~mixed_eq).any():
            r = np.abs(X @ self.A_eq[~mixed_eq].T - self.b_eq[~mixed_eq])
            ok &= np.all(r <= eq_scale[~mixed_eq], axis=1)
        if (~mixed_ub).any():
            r = X @ self.A_ub[~mixed_ub].T - self.b_ub[~mixed_ub]
            ok &= np.all(r <= ub_scale[~mixed_ub], axis=1)
        # Mixed rows: a necessary test over the continuous ranges, then the LP.
        ranges = self._geometry[0]
        cont = ~fixed
        lo, hi = ranges[cont, 0], ranges[cont, 1]
        for A, b, rows, tol, is_eq in ((self.A_ub, self.b_ub, mixed_ub, ub_scale, False),
                                       (self.A_eq, self.b_eq, mixed_eq, eq_scale, True)):
            if not rows.any():
                continue
            Ac = A[rows][:, cont]
            rest = X @ A[rows].T - X[:, cont] @ Ac.T  # fixed and discrete part
            smin = np.minimum(Ac * lo, Ac * hi).sum(axis=1)
            smax = np.maximum(Ac * lo, Ac * hi).sum(axis=1)
            ok &= np.all(rest + smin <= b[rows] + tol[rows], axis=1)
            if is_eq:
                ok &= np.all(rest + smax >= b[rows] - tol[rows], axis=1)
        idx = np.flatnonzero(ok)
        if idx.size:
            keys = np.round(self._shift_key(V[idx]), 12)
            _, first, inverse = np.unique(keys, axis=0, return_index=True, return_inverse=True)
            has_slice = np.array([self._slice_for(V[idx[i]]) is not None for i in first])
            ok[idx] = has_slice[inverse.reshape(-1)]
        return ok

    def _slice_for(self, combo: np.ndarray) -> _Slice | None:
        """Slice of the continuous factors for a combination (cached by its row shift)."""
        key = tuple(np.round(self._shift_key(combo[None, :])[0], 12))
        cache = self._slice_cache
        if key not in cache:
            family = self._discrete_setup[0]
            v = self._combination_points(combo[None, :])[0]
            sl = family.build(v)
            if sl is not None and not self.contains(sl.base)[0]:
                sl = None
            cache[key] = sl
        return cache[key]

    @cached_property
    def _n_combinations(self) -> int:
        return math.prod(int(lv.size) for lv in self.levels.values())

    @cached_property
    def _enumerated(self) -> np.ndarray:
        """All feasible level combinations, shape (n_feasible, n_discrete)."""
        cand = self._candidate_levels()
        if any(c.size == 0 for c in cand):
            return np.zeros((0, self._discrete.size))
        V = np.array(list(itertools.product(*cand)), dtype=float)
        return _frozen(V[self._feasible_combinations(V)])

    def _draw_combinations(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """A feasible combination for each of n samples, uniform over the feasible ones."""
        D = self._discrete
        if self._n_combinations <= MAX_ENUMERATED_COMBINATIONS:
            combos = self._enumerated
            if combos.shape[0] == 0:
                raise ProtocolError(self.check().message)
            return combos[rng.integers(combos.shape[0], size=n)]
        # Too many to enumerate: draw uniformly and keep the feasible ones.
        cand = self._candidate_levels()
        out, have, drawn = np.empty((n, D.size)), 0, 0
        while have < n and drawn < 50 * max(n, N_SAMPLED_COMBINATIONS):
            m = max(2 * (n - have), 64)
            V = np.column_stack([c[rng.integers(c.size, size=m)] for c in cand])
            V = V[self._feasible_combinations(V)][: n - have]
            out[have: have + V.shape[0]] = V
            have += V.shape[0]
            drawn += m
        if have < n:
            raise ProtocolError(
                f"only {have} of {drawn} random combinations of the levels of "
                f"{', '.join(self.names[j] for j in D)} were feasible; the feasible ones "
                "are too rare to sample; narrow the levels to those that can occur"
            )
        return out

    # --------------------------------------------------------------- sampling
    def sample(self, n: int, *, rng, method: str = "hit-and-run",
               burn_in: int | None = None, thin: int | None = None,
               n_chains: int | None = None) -> np.ndarray:
        """Draw candidates uniformly from the design space by hit-and-run.

        Parameters
        ----------
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
            Every row passes :meth:`contains`.

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
        if method != "hit-and-run":
            raise ValueError(f"unknown sampling method {method!r}; use 'hit-and-run'")
        n = int(n)
        if n < 0:
            raise ValueError(f"n must be non-negative, got {n}")
        rng = np.random.default_rng(rng)
        self._require_nonempty()
        burn_in = HIT_AND_RUN_BURN_IN if burn_in is None else int(burn_in)
        thin = HIT_AND_RUN_THIN if thin is None else int(thin)
        if burn_in < 0 or thin < 1:
            raise ValueError(f"burn_in must be >= 0 and thin >= 1, got {burn_in}, {thin}")
        X = np.empty((n, self.n_factors))
        if n == 0:
            return X
        if not self.levels:
            X[:] = self._walk(self._geometry[1], n, rng, burn_in, thin, n_chains)
            return X
        V = self._draw_combinations(n, rng)
        # Samples whose combinations shift the mixed rows alike share a slice.
        _, group = np.unique(np.round(self._shift_key(V), 12), axis=0, return_inverse=True)
        group = group.reshape(-1)
        for g in range(int(group.max()) + 1):
            rows = np.flatnonzero(group == g)
            sl = self._slice_for(V[rows[0]])
            X[rows] = self._walk(sl, rows.size, rng, burn_in, thin, n_chains, V[rows])
        return X

    def _walk(self, sl: _Slice, n: int, rng, burn_in: int, thin: int,
              n_chains: int | None, discrete: np.ndarray | None = None) -> np.ndarray:
        """n points of one slice (discrete columns from ``discrete``), each checked."""
        if sl.dim == 0:
            S = np.zeros((n, 0))
        else:
            chains = min(n, DEFAULT_N_CHAINS) if n_chains is None else max(1, min(int(n_chains), n))
            with blas_limit():  # small matrix products are faster on one thread
                S = _hit_and_run(sl.G, sl.h, n, chains, burn_in, thin, rng)
        X = self._finish(sl, sl.to_x(S), discrete)
        ok = self.contains(X)
        if not ok.all():
            X[~ok] = self._finish(sl, sl.to_x(sl.pull_in(sl.to_s(X[~ok]))),
                                  None if discrete is None else discrete[~ok])
            ok = self.contains(X)
        if not ok.all():
            good = np.flatnonzero(ok)
            if good.size == 0:
                raise ProtocolError(
                    "the design space is too thin to hold sampled points within the "
                    f"tolerance {FEASIBILITY_TOL:g}; widen the tightest bounds"
                )
            X[~ok] = X[rng.choice(good, size=int((~ok).sum()))]
        return X

    def _finish(self, sl: _Slice, X: np.ndarray, discrete: np.ndarray | None) -> np.ndarray:
        """Exact values on fixed and discrete columns; clip rounding-level box excursions."""
        lo, hi = self._relaxed_bounds
        F = sl.free
        if F.size == self.n_factors:
            np.clip(X, lo, hi, out=X)
        else:
            fixed = np.setdiff1d(np.arange(self.n_factors), F)
            X[:, fixed] = sl.base[fixed]
            X[:, F] = np.clip(X[:, F], lo[F], hi[F])
        if discrete is not None:
            X[:, self._discrete] = discrete
        return X

    # ------------------------------------------------------------- projection
    def project(self, x) -> np.ndarray:
        """Nearest point of the design space (Euclidean in unit-scaled coordinates).

        Parameters
        ----------
        x : array of shape (n_factors,)

        Returns
        -------
        ndarray of shape (n_factors,)
            ``x`` itself (a copy) when it is already inside.

        Notes
        -----
        A cvxpy QP with discrete factors relaxed; the discrete factors are then
        snapped to the nearest feasible level combination (unit-scaled
        distance) and the QP is solved again for the continuous factors.
        The solution is polished onto the equalities and pulled towards the
        slice centre far enough that every inequality holds.
        """
        x = self._as_points(x)
        if x.shape[0] != 1:
            raise ValueError("project takes a single point of shape (n_factors,)")
        x = x[0].copy()
        chk = self._require_nonempty()
        if self.contains(x)[0]:
            return x
        r = chk.ranges
        w = np.where(self.free, r[:, 1] - r[:, 0], 1.0)
        lo, hi = self._relaxed_bounds
        y = self._qp(x, w, lo, hi)
        combo = None
        if not self.levels:
            sl = self._geometry[1]
        else:
            combo, sl = self._nearest_combination(y, w)
            lo2, hi2 = lo.copy(), hi.copy()
            lo2[self._discrete] = combo
            hi2[self._discrete] = combo
            y = self._qp(x, w, lo2, hi2)
            combo = combo[None, :]
        y = self._finish(sl, sl.to_x(sl.pull_in(sl.to_s(y[None, :]))), combo)[0]
        if not self.contains(y)[0]:
            y = self._finish(sl, sl.base[None, :].copy(), combo)[0]
        return y

    def _qp(self, x, w, lo, hi) -> np.ndarray:
        d = self.n_factors
        y = cp.Variable(d)
        cons = [y >= lo, y <= hi]
        if self.A_eq.shape[0]:
            cons.append(self.A_eq @ y == self.b_eq)
        if self.A_ub.shape[0]:
            cons.append(self.A_ub @ y <= self.b_ub)
        prob = cp.Problem(cp.Minimize(cp.sum_squares(cp.multiply(1.0 / w, y - x))), cons)
        _solve(prob, what="the projection onto the design space", solver=QP_SOLVER)
        if prob.status not in _FEASIBLE:
            raise ProtocolError("the projection onto the design space found no point; "
                                "the space may be too thin for the solver")
        return np.asarray(y.value, dtype=float).reshape(d)

    def _nearest_combination(self, y, w) -> tuple[np.ndarray, _Slice]:
        """Feasible level combination nearest (unit-scaled) to y's discrete part."""
        D = self._discrete
        snapped = np.array([self.levels[j][np.argmin(np.abs(self.levels[j] - y[j]))]
                            for j in D])
        if self._feasible_combinations(snapped[None, :])[0]:
            return snapped, self._slice_for(snapped)
        if self._n_combinations <= MAX_ENUMERATED_COMBINATIONS:
            combos = self._enumerated
        else:
            combos = self._draw_combinations(N_SAMPLED_COMBINATIONS, np.random.default_rng(0))
        dist = np.sum(((combos - y[D]) / w[D]) ** 2, axis=1)
        best = combos[int(np.argmin(dist))]
        return best, self._slice_for(best)


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
