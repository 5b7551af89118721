"""The design space: a polytope (box, linear equalities and inequalities) plus discrete levels.

A :class:`DesignSpace` is built from arrays (the protocol module builds one from
a protocol file). It holds the data and answers the questions that need no
solver: membership, the rule a point breaks, scaling to the unit cube. The
rest it hands to the modules of this package, keeping their answers for the
life of the space:

- :mod:`~guardband.planner.space.feasibility`: emptiness and conflicting
  constraints, the reachable range of each factor, the centre (cvxpy LPs);
- :mod:`~guardband.planner.space.levels`: feasible combinations of discrete levels;
- :mod:`~guardband.planner.space.sampler`: uniform candidates by hit-and-run
  (Smith 1984), which stays inside the polytope however thin it is;
- :mod:`~guardband.planner.space.projection`: the nearest point of the space.

Attributes with a leading underscore (``_geometry``, ``_relaxed_bounds``, ...)
are shared with those modules, not with callers.
"""

from __future__ import annotations

import dataclasses
import types
from dataclasses import dataclass, field
from functools import cached_property
from typing import Mapping

import numpy as np

from guardband.planner.errors import ProtocolError
from guardband.planner.settings import FEASIBILITY_TOL, FIXED_RANGE_TOL
from guardband.planner.space import feasibility, projection, sampler
from guardband.planner.space.arrays import read_only
from guardband.planner.space.feasibility import Group, GroupKind, SpaceCheck
from guardband.planner.space.levels import LevelCombinations
from guardband.planner.space.slices import Slice

__all__ = ["DesignSpace"]


def _vector(value, what: str, size: int) -> np.ndarray:
    """A read-only finite float copy of shape (size,)."""
    arr = np.array(value, dtype=float, copy=True).reshape(-1) if value is not None \
        else np.zeros(0)
    if arr.shape != (size,):
        raise ValueError(f"{what} must have shape ({size},), got {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{what} must be finite, got {arr}")
    return read_only(arr)


def _matrix(value, what: str, d: int) -> np.ndarray:
    """A read-only finite float copy of shape (m, d); None gives no rows."""
    if value is None:
        return read_only(np.zeros((0, d)))
    arr = np.array(value, dtype=float, copy=True)
    if arr.ndim == 1 and arr.size == 0:
        arr = arr.reshape(0, d)
    if arr.ndim != 2 or arr.shape[1] != d:
        raise ValueError(f"{what} must have shape (m, {d}), got {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{what} must be finite")
    return read_only(arr)


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

        setattr_(self, "lower", _vector(self.lower, "lower", d))
        setattr_(self, "upper", _vector(self.upper, "upper", d))
        for a_name, b_name, l_name, default in (
            ("A_eq", "b_eq", "eq_labels", "equality"),
            ("A_ub", "b_ub", "ub_labels", "inequality"),
        ):
            A = _matrix(getattr(self, a_name), a_name, d)
            b = _vector(getattr(self, b_name), b_name, A.shape[0])
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
            levels[j] = read_only(arr)
        setattr_(self, "levels", types.MappingProxyType(dict(sorted(levels.items()))))

        units = self.units if self.units is not None else ("",) * d
        units = tuple(str(u) for u in units)
        if len(units) != d:
            raise ValueError(f"units needs {d} entries, got {len(units)}")
        setattr_(self, "units", units)
        # Normalise every rule row to its own scale (its largest coefficient
        # times that factor's declared span) before any tolerance applies: a
        # rule and its multiples are the same rule (1e-13 * x1 <= 1e-14 is x1 <= 0.1).
        for a_name, b_name, fold in (("A_eq", "b_eq", False), ("A_ub", "b_ub", True)):
            A, b = self.normalise_rows(getattr(self, a_name), getattr(self, b_name), fold=fold)
            setattr_(self, a_name, read_only(A))
            setattr_(self, b_name, read_only(b))

    # ------------------------------------------------------------- scale-free
    @cached_property
    def _frame(self) -> tuple[np.ndarray, np.ndarray]:
        """Offset and scale of each factor: ``x = offset + scale * u`` maps [0, 1] onto its declared span.

        The span is the declared bounds joined with the discrete levels; a
        factor fixed by its bounds is scaled by its magnitude (1 at 0).
        Every tolerance of this package applies to the space in these
        coordinates (:attr:`_unit`), so a study written in mol/L behaves as
        the same study written in nmol/L, or offset (kelvin, not degrees C).
        """
        lo, hi = self.lower.copy(), self.upper.copy()
        for j, lv in self.levels.items():
            lo[j], hi[j] = min(lo[j], lv[0]), max(hi[j], lv[-1])
        width, magnitude = hi - lo, np.maximum(np.abs(lo), np.abs(hi))
        scale = np.where(width > 0, width, np.where(magnitude > 0, magnitude, 1.0))
        return read_only(lo), read_only(scale)

    @cached_property
    def _fixed_by_bounds(self) -> np.ndarray:
        """Factors whose declared span (bounds joined with levels) is a single value."""
        lo, hi = self.lower.copy(), self.upper.copy()
        for j, lv in self.levels.items():
            lo[j], hi[j] = min(lo[j], lv[0]), max(hi[j], lv[-1])
        return read_only(hi - lo == 0)

    @property
    def _scale(self) -> np.ndarray:
        return self._frame[1]

    @property
    def factor_scale(self) -> np.ndarray:
        """Each factor's declared span (its magnitude when fixed; 1 for a factor fixed at 0)."""
        return self._scale

    def _to_frame(self, X) -> np.ndarray:
        offset, scale = self._frame
        return (np.asarray(X, dtype=float) - offset) / scale

    def _from_frame(self, U) -> np.ndarray:
        offset, scale = self._frame
        return offset + np.asarray(U, dtype=float) * scale

    def normalise_rows(self, A, b, *, fold: bool = True) -> tuple[np.ndarray, np.ndarray]:
        """Rows ``A x <= b`` (or ``==``) divided by their largest coefficient times a factor's span.

        The one home of the rule: the design space's own rows and the
        screen's forbidden regions are normalised by it, so that a fixed
        tolerance on ``A x - b`` means the same at any scale. A row of
        zeros is left as it is.
        """
        A = np.atleast_2d(np.asarray(A, dtype=float)).copy()
        b = np.atleast_1d(np.asarray(b, dtype=float)).copy()
        # a factor fixed by its declared bounds is a constant: in a row that also
        # holds a free factor its term moves to the right-hand side, so that it
        # cannot set the row's scale (2 x3 + 1e-8 x1 <= c with x3 fixed is a rule on x1)
        # (only where the free terms stand above the rounding of the constants: below
        # that, a double cannot tell what the row says about them, and the row keeps
        # its fixed terms and their scale)
        # Equality rows keep every term (``fold=False``): they name which factors
        # form a mixture and its total.
        fixed = self._fixed_by_bounds
        if fold and np.any(fixed) and A.shape[0]:
            const = A[:, fixed] @ self._frame[0][fixed]
            free_norm = np.max(np.abs(A[:, ~fixed] * self._scale[~fixed]), axis=1, initial=0.0)
            rounding = 64 * np.finfo(float).eps * (np.abs(b) + np.abs(const)
                                                   + np.max(np.abs(A[:, fixed] * self._scale[fixed]), axis=1))
            rows = free_norm > rounding
            if np.any(rows):
                b[rows] -= const[rows]
                A[np.ix_(rows, fixed)] = 0.0
        norm = np.max(np.abs(A * self._scale), axis=1, initial=0.0)
        # coefficients below the smallest normal double say nothing a double can hold:
        # such a row is a row of zeros (0 <= b), not one divided into infinities
        negligible = norm < np.finfo(float).tiny
        A[negligible] = 0.0
        norm = np.where(negligible, 1.0, norm)
        return A / norm[:, None], b / norm

    @cached_property
    def _unit(self) -> "DesignSpace":
        """The same space in the coordinates of :attr:`_frame` (itself when they are the identity)."""
        offset, scale = self._frame
        if np.all(scale == 1.0) and np.all(offset == 0.0):
            return self
        return DesignSpace(
            self.names, self._to_frame(self.lower), self._to_frame(self.upper),
            self.A_eq * scale, self.b_eq - self.A_eq @ offset,
            self.A_ub * scale, self.b_ub - self.A_ub @ offset, self.eq_labels, self.ub_labels,
            {j: (lv - offset[j]) / scale[j] for j, lv in self.levels.items()}, self.units,
        )

    def _fixed(self, ranges: np.ndarray) -> np.ndarray:
        """Factors whose reachable range is narrower than FIXED_RANGE_TOL of their declared span."""
        return (ranges[:, 1] - ranges[:, 0]) < FIXED_RANGE_TOL * self._scale

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
    def groups(self) -> tuple[Group, ...]:
        """Constraint groups in reporting order: bounds, levels, equalities, inequalities."""
        out = [Group(f"bounds of {n}", GroupKind.BOUNDS, j) for j, n in enumerate(self.names)]
        out += [Group(f"levels of {self.names[j]}", GroupKind.LEVELS, j) for j in self.levels]
        out += [Group(lab, GroupKind.EQUALITY, i) for i, lab in enumerate(self.eq_labels)]
        out += [Group(lab, GroupKind.INEQUALITY, i) for i, lab in enumerate(self.ub_labels)]
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
        return read_only(np.concatenate(s))

    def contains(self, X, *, tol: float = FEASIBILITY_TOL) -> np.ndarray:
        """Whether each point lies in the design space.

        Parameters
        ----------
        X : array of shape (n, n_factors) or (n_factors,)
        tol : float
            Tolerance in factor-scaled units (each factor divided by its
            magnitude, each rule by its own), multiplied for each rule by
            max(1, its magnitude there).

        Returns
        -------
        ndarray of bool, shape (n,)
        """
        X = self._as_points(X)
        if self._unit is not self:
            return self._unit.contains(self._to_frame(X), tol=tol)
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
        unit = self._unit
        v = unit.violations(self._to_frame(x))[0]
        bad = np.flatnonzero(v > tol * unit._tol_scale)
        if bad.size == 0:
            return ""
        g = self.groups[bad[0]]
        x = x[0]
        if g.kind == GroupKind.BOUNDS:
            j = g.index
            side = f"below the lower bound {self.lower[j]:.6g}" if x[j] < self.lower[j] \
                else f"above the upper bound {self.upper[j]:.6g}"
            return f"{g.label}: {self.names[j]} = {x[j]:.6g} is {side}"
        if g.kind == GroupKind.LEVELS:
            j, lv = g.index, self.levels[g.index]
            return (f"{g.label}: {self.names[j]} = {x[j]:.6g} is not an allowed level "
                    f"({', '.join(f'{a:.6g}' for a in lv)})")
        if g.kind == GroupKind.EQUALITY:
            value = float(self.A_eq[g.index] @ x)
            return f"{g.label}: value {value:.6g} must equal {self.b_eq[g.index]:.6g}"
        value = float(self.A_ub[g.index] @ x)
        return f"{g.label}: value {value:.6g} exceeds the limit {self.b_ub[g.index]:.6g}"

    def _require_nonempty(self) -> SpaceCheck:
        chk = self.check()
        if chk.empty:
            raise ProtocolError(chk.message)
        return chk

    # --------------------------------------------------------------- scaling
    @property
    def free(self) -> np.ndarray:
        """Boolean mask of shape (n_factors,): factors whose reachable range is not ~0."""
        return ~self._fixed(self._require_nonempty().ranges)

    def to_unit(self, X) -> np.ndarray:
        """Scale points to [0, 1] per factor by the reachable ranges; fixed factors map to 0.5.

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

    # ------------------------------------------ answers from the other modules
    def check(self) -> SpaceCheck:
        """Is the space empty (and why), reachable factor ranges, and its Chebyshev centre.

        Returns
        -------
        SpaceCheck
            See :func:`~guardband.planner.space.feasibility.space_check`.
        """
        return self._check

    @cached_property
    def _check(self) -> SpaceCheck:
        if self._unit is self:
            return feasibility.space_check(self)
        found = self._unit.check()
        return dataclasses.replace(found, ranges=read_only(self._from_frame(found.ranges.T).T),
                                   centre=read_only(self._from_frame(found.centre)))

    @cached_property
    def _geometry(self) -> tuple[np.ndarray, Slice | None]:
        """Real ranges (n_factors, 2) and the relaxed slice (discrete factors continuous)."""
        return feasibility.geometry(self)

    @cached_property
    def _combinations(self) -> LevelCombinations:
        return LevelCombinations(self)

    def sample(self, n: int, *, rng, method: str = sampler.HIT_AND_RUN,
               burn_in: int | None = None, thin: int | None = None,
               n_chains: int | None = None) -> np.ndarray:
        """Draw n candidates uniformly from the design space by hit-and-run.

        Every row passes :meth:`contains`; the same seed gives the same points.
        Parameters and method: :func:`~guardband.planner.space.sampler.sample`.
        """
        if self._unit is not self:
            return self._from_frame(self._unit.sample(n, rng=rng, method=method, burn_in=burn_in,
                                                      thin=thin, n_chains=n_chains))
        return sampler.sample(self, n, rng=rng, method=method, burn_in=burn_in,
                              thin=thin, n_chains=n_chains)

    def project(self, x) -> np.ndarray:
        """Nearest point of the design space (Euclidean in unit-scaled coordinates).

        ``x`` itself (a copy) when it is already inside; see
        :func:`~guardband.planner.space.projection.project`.
        """
        if self._unit is not self:
            return self._from_frame(self._unit.project(self._to_frame(x)))
        return projection.project(self, x)
