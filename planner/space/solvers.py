"""The cvxpy problems the design space still has, and one way to solve them.

The linear and mixed-integer programmes go to scipy's HiGHS directly
(:mod:`.lp`), in the layout cvxpy's ``SCIPY`` interface gave them (scipy's
bundled HiGHS: vertex-exact solutions, and silent; cvxpy's ``HIGHS``
interface makes the installed highspy print a banner on stdout, which would
corrupt machine-readable output). The projection QP and the inscribed
ellipsoid use ``CLARABEL``, which ships with cvxpy; cvxpy is imported only
when one of these is solved (it takes about a second to import).
"""

from __future__ import annotations

from guardband.planner.errors import ProtocolError
from guardband.planner.space.lp import FEASIBLE, INFEASIBLE

__all__ = ["LP_SOLVER", "QP_SOLVER", "FEASIBLE", "INFEASIBLE", "solve"]

#: cvxpy solver tried first for a linear or mixed-integer problem.
LP_SOLVER = "SCIPY"
#: cvxpy solver for the projection quadratic programme.
QP_SOLVER = "CLARABEL"


def solve(prob, *, what: str, solver: str = LP_SOLVER) -> None:
    """Solve a cvxpy problem with the named solver, falling back to CLARABEL; raise if undecided."""
    import cvxpy as cp

    for name in (solver, "CLARABEL"):
        try:
            prob.solve(solver=name)
        except cp.error.SolverError:
            continue
        if prob.status in FEASIBLE or prob.status in INFEASIBLE:
            return
    raise ProtocolError(
        f"the solver could not settle {what} (status {prob.status!r}); check the "
        "constraints for very large or very small coefficients"
    )
