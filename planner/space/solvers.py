"""The cvxpy solvers the design space uses, and one way to call them.

Linear and mixed-integer programs go through cvxpy's ``SCIPY`` interface
(scipy's bundled HiGHS: vertex-exact simplex solutions, and silent; cvxpy's
``HIGHS`` interface makes the installed highspy print a banner on stdout,
which would corrupt machine-readable output). The projection QP uses
``CLARABEL``. Both ship with cvxpy.
"""

from __future__ import annotations

import cvxpy as cp

from guardband.planner.errors import ProtocolError

__all__ = ["LP_SOLVER", "QP_SOLVER", "FEASIBLE", "INFEASIBLE", "solve"]

#: cvxpy solver for linear and mixed-integer feasibility problems.
LP_SOLVER = "SCIPY"
#: cvxpy solver for the projection quadratic programme.
QP_SOLVER = "CLARABEL"

#: cvxpy statuses of a solved problem with a solution.
FEASIBLE = (cp.OPTIMAL, cp.OPTIMAL_INACCURATE)
#: cvxpy statuses of a problem shown to have no solution.
INFEASIBLE = (cp.INFEASIBLE, cp.INFEASIBLE_INACCURATE)


def solve(prob: cp.Problem, *, what: str, solver: str = LP_SOLVER) -> None:
    """Solve with the named solver, falling back to CLARABEL; raise if undecided."""
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
