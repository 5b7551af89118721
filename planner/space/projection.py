"""The nearest point of the design space: a cvxpy QP, then discrete levels."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from guardband.planner.errors import ProtocolError
from guardband.planner.space.slices import finish
from guardband.planner.space.solvers import FEASIBLE, QP_SOLVER, solve

if TYPE_CHECKING:
    from guardband.planner.space.polytope import DesignSpace

__all__ = ["project"]


def project(space: DesignSpace, x) -> np.ndarray:
    """Nearest point of the design space (Euclidean in unit-scaled coordinates).

    Parameters
    ----------
    space : DesignSpace
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
    x = space._as_points(x)
    if x.shape[0] != 1:
        raise ValueError("project takes a single point of shape (n_factors,)")
    x = x[0].copy()
    chk = space._require_nonempty()
    if space.contains(x)[0]:
        return x
    r = chk.ranges
    w = np.where(space.free, r[:, 1] - r[:, 0], 1.0)
    lo, hi = space._relaxed_bounds
    y = _qp(space, x, w, lo, hi)
    combo = None
    if not space.levels:
        sl = space._geometry[1]
    else:
        combo, sl = space._combinations.nearest(y, w)
        lo2, hi2 = lo.copy(), hi.copy()
        lo2[space._discrete] = combo
        hi2[space._discrete] = combo
        y = _qp(space, x, w, lo2, hi2)
        combo = combo[None, :]
    y = finish(space, sl, sl.to_x(sl.pull_in(sl.to_s(y[None, :]))), combo)[0]
    if not space.contains(y)[0]:
        y = finish(space, sl, sl.base[None, :].copy(), combo)[0]
    return y


def _qp(space: DesignSpace, x, w, lo, hi) -> np.ndarray:
    """Point within bounds lo, hi and every row, nearest x in coordinates scaled by w."""
    import cvxpy as cp  # here: it takes about a second to import

    d = space.n_factors
    y = cp.Variable(d)
    cons = [y >= lo, y <= hi]
    if space.A_eq.shape[0]:
        cons.append(space.A_eq @ y == space.b_eq)
    if space.A_ub.shape[0]:
        cons.append(space.A_ub @ y <= space.b_ub)
    prob = cp.Problem(cp.Minimize(cp.sum_squares(cp.multiply(1.0 / w, y - x))), cons)
    solve(prob, what="the projection onto the design space", solver=QP_SOLVER)
    if prob.status not in FEASIBLE:
        raise ProtocolError("the projection onto the design space found no point; "
                            "the space may be too thin for the solver")
    return np.asarray(y.value, dtype=float).reshape(d)
