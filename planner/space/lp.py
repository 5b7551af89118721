"""The design space's linear programmes, handed to scipy's HiGHS directly.

The emptiness check, the reachable ranges and the centre of the design space
are small LPs. They were written as cvxpy problems solved through its
``SCIPY`` interface (scipy's bundled HiGHS). Importing cvxpy takes about a
second, most of what ``guardband check`` costs, and compiling each problem
takes milliseconds. So each LP is built here in the very layout that cvxpy
hands to ``scipy.optimize.linprog``: the same variables in the same order,
the same rows in the same order with the same signs, the same sparse storage,
and the same call. HiGHS then returns the same solutions, bit for bit (HiGHS
is deterministic). ``tests/test_lp_layout.py`` compares every layout with
cvxpy's own problem data and the solutions with cvxpy's.

How cvxpy lays out an LP (version pinned in constraints.txt): the variables
in order of first appearance, objective first; equality rows (its zero cone)
before inequality rows (its nonnegative cone), each in the order of the
constraints; ``a @ x >= b`` becomes the row ``-a``, ``-b``; a maximisation
is the minimisation of the negated objective. A status other than optimal or
infeasible leaves the problem to cvxpy's ``CLARABEL``, as before
(:func:`solve_lp`). The mixed-integer level checks go to scipy's ``milp`` in
the same way (:func:`solve_milp`); the inscribed ellipsoid and the
projection QP stay cvxpy problems.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from guardband.planner.errors import ProtocolError

__all__ = ["LP", "MILP", "LPSolution", "FEASIBLE", "INFEASIBLE", "solve_lp", "solve_milp", "box_rows", "ranges_lp", "chebyshev_lp", "nearest_centre_lp",
           "support_lp"]

#: cvxpy's status names (``cvxpy.OPTIMAL``, ...): callers compare with them.
#: A solved problem with a solution:
FEASIBLE = ("optimal", "optimal_inaccurate")
#: A problem shown to have no solution:
INFEASIBLE = ("infeasible", "infeasible_inaccurate")
#: ``linprog``'s status codes, as cvxpy's SCIPY interface reads them (3: unbounded, 4: error).
_STATUS = {0: "optimal", 1: "optimal_inaccurate", 2: "infeasible", 3: "unbounded", 4: "solver_error"}


@dataclass(frozen=True)
class LP:
    """minimise ``c @ x`` subject to ``G @ x <= h`` and ``A @ x == b`` (x free).

    ``G`` and ``A`` are dense here (None: no such rows); :func:`solve_lp`
    stores them as cvxpy does. ``sense`` is -1 for a maximisation written
    as the minimisation of ``-c``: the problem's value is then ``-(c @ x)``.
    """

    c: np.ndarray
    G: np.ndarray | None
    h: np.ndarray | None
    A: np.ndarray | None = None
    b: np.ndarray | None = None
    sense: float = 1.0

    def data(self) -> dict:
        """The arguments cvxpy's SCIPY interface passes to ``linprog`` (keys as in its problem data)."""
        from scipy.sparse import csc_array

        def sparse(M):
            if M is None:
                return None
            S = csc_array(M)
            S.indices = S.indices.astype(np.int64)
            S.indptr = S.indptr.astype(np.int64)
            return S

        def vector(v):  # cvxpy's data hold no negative zeros (-0.0 + 0.0 is 0.0; no other value moves)
            return None if v is None else np.asarray(v, dtype=float) + 0.0

        return {"c": vector(self.c), "G": sparse(self.G), "h": vector(self.h), "A": sparse(self.A),
                "b": vector(self.b)}


@dataclass(frozen=True)
class MILP(LP):
    """An :class:`LP` whose variables from ``first_boolean`` on are 0 or 1 (cvxpy's boolean variables)."""

    first_boolean: int = 0

    def lower_bounds(self) -> np.ndarray | None:
        """cvxpy's variable bounds: none on the continuous variables, 0 under the booleans
        (None without booleans)."""
        if self.first_boolean >= self.c.size:
            return None
        lb = np.full(self.c.size, -np.inf)
        lb[self.first_boolean:] = 0.0
        return lb


@dataclass(frozen=True)
class LPSolution:
    """What cvxpy's ``Problem.solve`` would leave: status, variable values (None unless solved) and value."""

    status: str
    x: np.ndarray | None
    value: float


def solve_lp(lp: LP, *, what: str, fallback: Callable[[], tuple] | None = None) -> LPSolution:
    """Solve with scipy's HiGHS as cvxpy's SCIPY interface does; if HiGHS leaves the problem
    unsettled, solve the original cvxpy problem with CLARABEL.

    Parameters
    ----------
    lp : LP
    what : str
        What the problem decides, for the error message.
    fallback : callable, optional
        Builds the cvxpy problem: returns ``(problem, read)`` where
        ``read()`` gives the solution vector in this LP's variable order.

    Raises
    ------
    ProtocolError
        When neither solver settles the problem.
    """
    from scipy.optimize import linprog

    data = lp.data()
    res = linprog(data["c"], A_ub=data["G"], b_ub=data["h"], A_eq=data["A"], b_eq=data["b"], method="highs",
                  options={}, bounds=(None, None))
    status = _STATUS.get(res.status, "solver_error")
    if status == "optimal_inaccurate" and res.x is None:
        status = "solver_error"
    if status in FEASIBLE:
        return LPSolution(status, np.asarray(res.x), lp.sense * (res.fun + 0.0))
    if status in INFEASIBLE:
        return LPSolution(status, None, lp.sense * np.inf)
    return _clarabel(fallback, what, status)


def solve_milp(problem: MILP, *, what: str, fallback: Callable[[], tuple] | None = None) -> LPSolution:
    """Solve with scipy's ``milp`` (HiGHS) as cvxpy's SCIPY interface does for a problem with
    boolean variables; an unsettled problem goes to cvxpy, as :func:`solve_lp`. Without
    booleans (a discrete factor with one level) cvxpy solves an LP, and so does this."""
    from scipy.optimize import Bounds, LinearConstraint, milp

    if problem.lower_bounds() is None:
        return solve_lp(problem, what=what, fallback=fallback)
    data = problem.data()
    n = data["c"].shape[0]
    lb = problem.lower_bounds()
    bounds = [(lb[i], None) for i in range(n)]
    for i in range(problem.first_boolean, n):  # cvxpy: a boolean lies in [max(0, lb), 1]
        bounds[i] = (max(0, bounds[i][0]), 1)
    constraints = []
    if data["G"] is not None:
        ineq = LinearConstraint(data["G"], ub=data["h"])
        ineq.A.indptr = ineq.A.indptr.astype(np.int32)
        ineq.A.indices = ineq.A.indices.astype(np.int32)
        constraints.append(ineq)
    if data["A"] is not None:
        constraints.append(LinearConstraint(data["A"], data["b"], data["b"]))
    res = milp(data["c"], constraints=constraints, options={},
               integrality=[0] * problem.first_boolean + [1] * (n - problem.first_boolean),
               bounds=Bounds([t[0] for t in bounds], [t[1] if t[1] is not None else np.inf for t in bounds]))
    status = _STATUS.get(res.status, "solver_error")
    if status == "optimal_inaccurate" and res.x is None:
        status = "solver_error"
    if status in FEASIBLE:
        return LPSolution(status, np.asarray(res.x), problem.sense * (res.fun + 0.0))
    if status in INFEASIBLE:
        return LPSolution(status, None, problem.sense * np.inf)
    return _clarabel(fallback, what, status)


def _clarabel(fallback, what: str, status: str) -> LPSolution:
    """The cvxpy problem, solved with CLARABEL (the second solver cvxpy was given)."""
    if fallback is not None:
        import cvxpy as cp

        prob, read = fallback()
        try:
            prob.solve(solver="CLARABEL")
        except cp.error.SolverError:
            pass
        else:
            status = prob.status
            if status in FEASIBLE:
                return LPSolution(status, read(), float(prob.value))
            if status in INFEASIBLE:
                return LPSolution(status, None, float(prob.value))
    raise ProtocolError(
        f"the solver could not settle {what} (status {status!r}); check the "
        "constraints for very large or very small coefficients"
    )


def box_rows(d: int, j, lo, hi) -> tuple[np.ndarray, np.ndarray]:
    """Rows and right-hand sides of ``x[j] >= lo`` then ``x[j] <= hi`` (j a column or all of them)."""
    eye = np.eye(d)[j]
    eye = np.atleast_2d(eye)
    lo, hi = np.atleast_1d(lo), np.atleast_1d(hi)
    return np.vstack([-eye, eye]), np.concatenate([-lo, hi])


def ranges_lp(c, lo, hi, A_eq, b_eq, A_ub, b_ub) -> LP:
    """minimise ``c @ x`` over ``lo <= x <= hi``, ``A_eq x == b_eq``, ``A_ub x <= b_ub``."""
    d = lo.size
    G, h = box_rows(d, slice(None), lo, hi)
    if A_ub.shape[0]:
        G, h = np.vstack([G, A_ub]), np.concatenate([h, b_ub])
    if A_eq.shape[0]:
        return LP(np.asarray(c, dtype=float), G, h, A_eq, b_eq)
    return LP(np.asarray(c, dtype=float), G, h)


def chebyshev_lp(G, gnorm, h) -> LP:
    """maximise ``r`` over ``(r, t)`` with ``G t + r ||g_i|| <= h`` and ``r <= 1``: variables ``[r, t]``."""
    m, k = G.shape
    rows = np.vstack([np.column_stack([gnorm, G]), np.eye(1, k + 1)])
    c = np.zeros(k + 1)
    c[0] = -1.0
    return LP(c, rows, np.concatenate([h, [1.0]]), sense=-1.0)


def nearest_centre_lp(G, hh, t_mid) -> LP:
    """minimise ``||t - t_mid||_1`` over ``G t <= hh``: variables ``[s, t]``, ``-s <= t - t_mid <= s``."""
    m, k = G.shape
    eye = np.eye(k)
    rows = np.vstack([np.hstack([-eye, eye]), np.hstack([-eye, -eye]), np.hstack([np.zeros((m, k)), G])])
    c = np.concatenate([np.ones(k), np.zeros(k)])
    return LP(c, rows, np.concatenate([t_mid, -t_mid, hh]))


def support_lp(c, G, h) -> LP:
    """minimise ``c @ t`` over ``G t <= h``."""
    return LP(np.asarray(c, dtype=float), G, h)
