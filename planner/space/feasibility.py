"""Is the design space empty, and why; the reachable range of each factor; its centre.

Each answer is a linear (or, with exact discrete levels, mixed-integer)
programme, handed to scipy's HiGHS in the layout cvxpy gave it (:mod:`.lp`);
the cvxpy problems themselves stay here, as the fallback and the tests'
reference. :func:`space_check` puts the answers together in a
:class:`SpaceCheck`; :class:`~guardband.planner.space.polytope.DesignSpace`
computes it once, on first use, and keeps it, as it keeps :func:`geometry`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from guardband.planner.settings import FEASIBILITY_TOL, FIXED_RANGE_TOL
from guardband.planner.space.arrays import nan_to_none, read_only
from guardband.planner.space.levels import MAX_ENUMERATED_COMBINATIONS
from guardband.planner.space.slices import Slice, SliceFamily
from guardband.planner.space.lp import FEASIBLE, LP, MILP, box_rows, ranges_lp, solve_lp, solve_milp

if TYPE_CHECKING:
    from guardband.planner.space.polytope import DesignSpace

__all__ = ["SpaceCheck", "Group", "GroupKind", "geometry", "space_check"]


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
            "ranges": nan_to_none(self.ranges),
            "centre": nan_to_none(self.centre),
            "radius": nan_to_none(self.radius),
            "message": self.message,
            "dimension": int(self.dimension),
        }

    def single_point(self, names) -> str | None:
        """The refusal for a space that is one point (nothing to choose between), else None."""
        if self.empty or self.dimension != 0:
            return None
        at = ", ".join(f"{n} = {v:.6g}" for n, v in zip(names, self.centre))
        return (f"the design space is a single point ({at}): the bounds and constraints fix every "
                "factor, so there is nothing to plan. Widen a factor's bounds or relax a constraint")


class GroupKind:
    """The kinds of constraint group (plain strings)."""

    BOUNDS = "bounds"
    LEVELS = "levels"
    EQUALITY = "eq"
    INEQUALITY = "ub"


@dataclass(frozen=True)
class Group:
    """One constraint group: the unit that conflict reports name."""

    label: str
    kind: str  # a GroupKind
    index: int


def _feasible(space: DesignSpace, active: np.ndarray, *, exact_levels: bool) -> bool:
    """Whether the constraint groups flagged in ``active`` can all hold at once."""
    if exact_levels and any(on and g.kind == GroupKind.LEVELS for g, on in zip(space.groups, active)):
        return _feasible_exact(space, active)
    lp = _feasibility_lp(space, active)
    if lp is None:
        return True
    fallback = lambda: (_feasibility_problem(space, active, exact_levels=False), lambda: None)
    return solve_lp(lp, what="whether the design space is empty", fallback=fallback).status in FEASIBLE


def _feasibility_lp(space: DesignSpace, active: np.ndarray) -> LP | None:
    """:func:`_feasibility_problem` (levels relaxed) in cvxpy's layout; None without constraints."""
    d = space.n_factors
    eq_rows, eq_rhs, ub_rows, ub_rhs = [], [], [], []
    for g, on in zip(space.groups, active):
        if not on:
            continue
        j = g.index
        if g.kind in (GroupKind.BOUNDS, GroupKind.LEVELS):
            lo, hi = ((space.lower[j], space.upper[j]) if g.kind == GroupKind.BOUNDS
                      else (space.levels[j][0], space.levels[j][-1]))
            rows, rhs = box_rows(d, j, lo, hi)
            ub_rows.append(rows)
            ub_rhs.append(rhs)
        elif g.kind == GroupKind.EQUALITY:
            eq_rows.append(space.A_eq[j][None, :])
            eq_rhs.append(space.b_eq[j:j + 1])
        else:
            ub_rows.append(space.A_ub[j][None, :])
            ub_rhs.append(space.b_ub[j:j + 1])
    if not eq_rows and not ub_rows:
        return None
    stack = lambda parts, rhs: (np.vstack(parts), np.concatenate(rhs)) if parts else (None, None)
    return LP(np.zeros(d), *stack(ub_rows, ub_rhs), *stack(eq_rows, eq_rhs))


def _feasible_exact(space: DesignSpace, active: np.ndarray) -> bool:
    """With each discrete factor at one of its levels: a mixed-integer programme."""
    milp = _feasibility_milp(space, active)
    fallback = lambda: (_feasibility_problem(space, active, exact_levels=True), lambda: None)
    return solve_milp(milp, what="whether the design space is empty", fallback=fallback).status in FEASIBLE


def _feasibility_milp(space: DesignSpace, active: np.ndarray) -> MILP:
    """:func:`_feasibility_problem` with exact levels, in cvxpy's layout: the factors, then one
    block of 0/1 picks per discrete factor with several levels (its level is ``levels @ pick``)."""
    d = space.n_factors
    blocks = [space.levels[g.index] for g, on in zip(space.groups, active)
              if on and g.kind == GroupKind.LEVELS and space.levels[g.index].size > 1]
    n = d + sum(lv.size for lv in blocks)
    eq_rows, eq_rhs, ub_rows, ub_rhs = [], [], [], []
    start = d
    for g, on in zip(space.groups, active):
        if not on:
            continue
        j = g.index
        if g.kind == GroupKind.BOUNDS:
            rows, rhs = box_rows(d, j, space.lower[j], space.upper[j])
            ub_rows.append(np.hstack([rows, np.zeros((2, n - d))]))
            ub_rhs.append(rhs)
        elif g.kind == GroupKind.LEVELS:
            lv = space.levels[j]
            row = np.zeros((2, n)) if lv.size > 1 else np.zeros((1, n))
            if lv.size > 1:  # sum(pick) == 1, then x_j - levels @ pick == 0
                row[0, start:start + lv.size] = 1.0
                row[1, j] = 1.0
                row[1, start:start + lv.size] = -lv
                eq_rows.append(row)
                eq_rhs.append(np.array([1.0, 0.0]))
                start += lv.size
            else:  # x_j == its one level
                row[0, j] = 1.0
                eq_rows.append(row)
                eq_rhs.append(lv[:1])
        elif g.kind == GroupKind.EQUALITY:
            eq_rows.append(np.hstack([space.A_eq[j], np.zeros(n - d)])[None, :])
            eq_rhs.append(space.b_eq[j:j + 1])
        else:
            ub_rows.append(np.hstack([space.A_ub[j], np.zeros(n - d)])[None, :])
            ub_rhs.append(space.b_ub[j:j + 1])
    stack = lambda parts, rhs: (np.vstack(parts), np.concatenate(rhs)) if parts else (None, None)
    return MILP(np.zeros(n), *stack(ub_rows, ub_rhs), *stack(eq_rows, eq_rhs), first_boolean=d)


def _feasibility_problem(space: DesignSpace, active: np.ndarray, *, exact_levels: bool):
    """The cvxpy problem of :func:`_feasible` (None without constraints)."""
    import cvxpy as cp

    d = space.n_factors
    x = cp.Variable(d)
    cons = []
    for g, on in zip(space.groups, active):
        if not on:
            continue
        j = g.index
        if g.kind == GroupKind.BOUNDS:
            cons += [x[j] >= space.lower[j], x[j] <= space.upper[j]]
        elif g.kind == GroupKind.LEVELS:
            lv = space.levels[j]
            if exact_levels and lv.size > 1:
                pick = cp.Variable(lv.size, boolean=True)
                cons += [cp.sum(pick) == 1, x[j] == lv @ pick]
            elif exact_levels:
                cons.append(x[j] == lv[0])
            else:
                cons += [x[j] >= lv[0], x[j] <= lv[-1]]
        elif g.kind == GroupKind.EQUALITY:
            cons.append(space.A_eq[j] @ x == space.b_eq[j])
        else:
            cons.append(space.A_ub[j] @ x <= space.b_ub[j])
    if not cons:
        return None
    return cp.Problem(cp.Minimize(0), cons)


def _conflicts(space: DesignSpace, *, exact_levels: bool) -> tuple[tuple[str, ...], str]:
    """Constraint groups that conflict, and a sentence saying how they were found."""
    n = len(space.groups)
    full = np.ones(n, dtype=bool)
    singles = []
    for i in range(n):
        trial = full.copy()
        trial[i] = False
        if _feasible(space, trial, exact_levels=exact_levels):
            singles.append(space.groups[i].label)
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
        if _feasible(space, keep, exact_levels=exact_levels):
            keep[i] = True
    iis = tuple(space.groups[i].label for i in np.flatnonzero(keep))
    return iis, (
        "no single constraint explains it; these constraints cannot hold together "
        "(an irreducible set: dropping any one of them removes this conflict): "
        + "; ".join(iis)
    )


def _emptiness(space: DesignSpace) -> tuple[tuple[str, ...], str] | None:
    """None when feasible, else (conflicting groups, message)."""
    all_on = np.ones(len(space.groups), dtype=bool)
    if not _feasible(space, all_on, exact_levels=False):
        conflicts, how = _conflicts(space, exact_levels=False)
        return conflicts, f"the design space is empty; {how}"
    if space.levels and not _feasible(space, all_on, exact_levels=True):
        conflicts, how = _conflicts(space, exact_levels=True)
        return conflicts, f"no combination of the discrete levels is feasible; {how}"
    return None


def _lp_ranges(space: DesignSpace) -> np.ndarray:
    """Minimum and maximum of every factor: two LPs each (discrete relaxed)."""
    d = space.n_factors
    lo, hi = space._relaxed_bounds
    ranges = np.empty((d, 2))
    for j in range(d):
        if hi[j] - lo[j] < FIXED_RANGE_TOL:
            ranges[j] = lo[j], hi[j]
            continue
        for side, sign in ((0, 1.0), (1, -1.0)):
            c = sign * np.eye(d)[j]
            lp = ranges_lp(c, lo, hi, space.A_eq, space.b_eq, space.A_ub, space.b_ub)
            found = solve_lp(lp, what=f"the range of {space.names[j]}",
                             fallback=lambda c=c: _ranges_problem(space, c))
            ranges[j, side] = found.x[j]
    ranges = np.clip(ranges, lo[:, None], hi[:, None])
    ranges[:, 1] = np.maximum(ranges[:, 1], ranges[:, 0])
    return ranges


def _ranges_problem(space: DesignSpace, c: np.ndarray):
    """The cvxpy problem of one range LP, and how to read its solution."""
    import cvxpy as cp

    lo, hi = space._relaxed_bounds
    x = cp.Variable(space.n_factors)
    cons = [x >= lo, x <= hi]
    if space.A_eq.shape[0]:
        cons.append(space.A_eq @ x == space.b_eq)
    if space.A_ub.shape[0]:
        cons.append(space.A_ub @ x <= space.b_ub)
    return cp.Problem(cp.Minimize(c @ x), cons), lambda: np.asarray(x.value, dtype=float)


def geometry(space: DesignSpace) -> tuple[np.ndarray, Slice | None]:
    """Real ranges (n_factors, 2) and the relaxed slice (discrete factors continuous)."""
    ranges = read_only(_lp_ranges(space))
    width = ranges[:, 1] - ranges[:, 0]
    fixed = width < FIXED_RANGE_TOL
    family = SliceFamily(space, fixed, ranges[:, 0], np.where(fixed, 1.0, width),
                         *space._relaxed_bounds)
    return ranges, family.build(ranges.mean(axis=1))


def space_check(space: DesignSpace) -> SpaceCheck:
    """Is the space empty (and why), reachable factor ranges, and its Chebyshev centre."""
    d = space.n_factors
    nan_ranges = read_only(np.full((d, 2), np.nan))
    nan_centre = read_only(np.full(d, np.nan))

    def empty(conflicts, message):
        return SpaceCheck(True, tuple(conflicts), nan_ranges, nan_centre,
                          float("nan"), message, -1)

    found = _emptiness(space)
    if found is not None:
        return empty(*found)
    ranges, sl = space._geometry
    if sl is None:  # only if the LPs disagree with each other at the tolerance
        return empty(space.group_labels, "the design space is too thin to hold a point "
                     f"within the tolerance {FEASIBILITY_TOL:g}")
    n_fixed = int(np.sum(ranges[:, 1] - ranges[:, 0] < FIXED_RANGE_TOL))
    parts = [f"the design space is not empty: {d} factor{'s' * (d != 1)}, {n_fixed} "
             f"fixed, {sl.dim} free direction{'s' * (sl.dim != 1)}, Chebyshev radius "
             f"{sl.radius:.3g} (unit-scaled)"]
    if space.levels:
        n_all = space._combinations.n_all
        if n_all <= MAX_ENUMERATED_COMBINATIONS:
            n_ok = space._combinations.enumerated.shape[0]
            if n_ok == 0:
                return empty([f"levels of {space.names[j]}" for j in space.levels],
                             "no combination of the discrete levels is feasible; none "
                             "leaves room for a point within the tolerance "
                             f"{FEASIBILITY_TOL:g}")
            parts.append(f"{n_ok} of {n_all} combinations of levels are feasible")
        else:
            parts.append(f"{n_all} combinations of levels, at least one feasible")
    return SpaceCheck(False, (), ranges, read_only(sl.base.copy()), sl.radius,
                      "; ".join(parts), sl.dim)
