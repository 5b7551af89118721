"""Local refinement of the best candidates, with the screen as a constraint.

SLSQP (scipy) moves the free continuous factors of a candidate (discrete
levels are kept); the design space's linear constraints are kept exactly,
and the screen enters as constraints p_i(x) >= probability_i and
joint(x) >= threshold, each aimed REFINE_MARGIN inside. Where factors
state a resolution, their bounds are first pulled in to the nearest
multiples of it, so rounding never has to jump a refined point back inside. Each refined point
is screened again in full before it can be chosen. With ``rescue`` (no
candidate passed the screen) the search maximises :func:`rescue_figure`
within the design space alone, and keeps any point that raised it: the sum
of the logs of the per-limit probabilities. The screen's joint figure (the
bound max(0, 1 - sum(1 - p_i)) by default) is flat at 0 wherever the
limits' shortfalls add up to one or more, which is most of the space before
any run is safe, so a search on it cannot move; the product of the p_i
rises wherever any of them does and is highest where all are high. It only
steers the search: a point it finds passes only if the screen, with its own
joint figure, passes it.
"""

from __future__ import annotations

import warnings

import numpy as np
from scipy.optimize import minimize

from guardband.planner.errors import ModelError
from guardband.planner.space.arrays import last_good_point
from guardband.planner.step.acquisition import score as rule_score, weighted_by_joint
from guardband.planner.step.context import StepContext
from guardband.planner.step.result import Mode
from guardband.safety.screen import figures_at

__all__ = ["refine", "rescue_figure", "REFINE_MARGIN"]

#: Forward-difference step (unit-scaled) for the refinement's gradients.
FD_STEP = 1e-6
#: Local refinement aims this far inside each probability requirement.
REFINE_MARGIN = 1e-3


def rescue_figure(P) -> np.ndarray:
    """What a rescue search climbs: the sum of the logs of the per-limit probabilities
    (NaN, a limit that cannot vouch, and 0 count as the smallest normal double)."""
    P = np.nan_to_num(np.asarray(P, dtype=float), nan=0.0)
    return np.sum(np.log(np.maximum(P, np.finfo(float).tiny)), axis=1)


def _values_at(ctx: StepContext, X, mode: str, inc_value, rank_kw, rule: str, rescue: bool = False):
    """Score (to maximise) and screen slack (>= 0 where it passes) at rows X."""
    U = ctx.scaler.unit(X)
    P, J = figures_at(ctx.limit_predictions(U), U.shape[0], method=ctx.rules.joint)
    if rescue:
        score = rescue_figure(P)
    elif mode == Mode.FEASIBILITY_FIRST:
        score = J
    else:
        mu, sd = ctx.models.objective.predict(U)
        score = rule_score(rule, mu, sd, inc_value, **rank_kw)
        if ctx.weigh_by_joint:
            score = weighted_by_joint(score, J)
    # aim a little inside the screen (REFINE_MARGIN) so that the refined
    # point still passes it after rounding
    req = np.array([lim.probability for lim in ctx.rules.limits]) + REFINE_MARGIN
    slack = np.column_stack([P - req, J - (ctx.rules.threshold + REFINE_MARGIN)])
    return np.maximum(score, -1e300), slack


def _problem(values_at, x0, cont, lo, span):
    """Objective and constraints with forward-difference gradients, all
    points of one gradient predicted in a single batched call."""
    k = cont.size
    last = {}

    def at(u):
        key = u.tobytes()
        if last.get("key") != key:
            Uv = np.vstack([u, u + FD_STEP * np.eye(k)])
            X = np.repeat(x0[None, :], k + 1, axis=0)
            X[:, cont] = lo + span * Uv
            last["key"], last["val"] = key, values_at(X)
        return last["val"]

    fun = lambda u: -float(at(u)[0][0])
    jac = lambda u: -(at(u)[0][1:] - at(u)[0][0]) / FD_STEP
    cfun = lambda u: at(u)[1][0]
    cjac = lambda u: ((at(u)[1][1:] - at(u)[1][0]) / FD_STEP).T
    return fun, jac, cfun, cjac


def _linear_constraints(space, x0, cont, lo, span) -> list[dict]:
    """A x <= b and A_eq x = b_eq in the variables u, with x = x0 (others) + lo + span * u."""
    rest = x0.copy()
    rest[cont] = lo
    cons = []
    if space.A_ub.shape[0]:
        A = space.A_ub[:, cont] * span
        b = space.b_ub - space.A_ub @ rest
        cons.append({"type": "ineq", "fun": lambda u, A=A, b=b: b - A @ u, "jac": lambda u, A=A: -A})
    if space.A_eq.shape[0]:
        A = space.A_eq[:, cont] * span
        b = space.b_eq - space.A_eq @ rest
        cons.append({"type": "eq", "fun": lambda u, A=A, b=b: A @ u - b, "jac": lambda u, A=A: A})
    return cons


def _grid_bounds(protocol, space, cont) -> tuple[np.ndarray, np.ndarray]:
    """The bounds of the refined factors, pulled in to the nearest multiples of a stated
    resolution, so that rounding never has to jump a refined point back inside a bound."""
    from guardband.planner.space.rounding import rounding_of  # here: the space package loads cvxpy

    rnd = rounding_of(protocol)
    lo, hi = space.lower[cont].copy(), space.upper[cont].copy()
    res = rnd.resolution[cont]
    has = np.isfinite(res)
    lo[has] = rnd.lo_units[cont][has] * res[has]
    hi[has] = rnd.hi_units[cont][has] * res[has]
    return lo, hi


def refine(ctx: StepContext, X_pool, top, inc_value, mode: str, rank_kw, *, rescue: bool = False,
           rule: str | None = None) -> np.ndarray:
    """Refine the pool candidates ``top`` locally for ``rule`` (default the protocol's);
    returns the refined points (protocol units)."""
    rule = ctx.protocol.ranking.rule if rule is None else rule
    space = ctx.space
    free = ctx.scaler.free.copy()
    for j in space.levels:
        free[j] = False
    cont = np.flatnonzero(free)
    if cont.size == 0 or any(lm is None for lm in ctx.models.limits):
        return np.zeros((0, X_pool.shape[1]))
    lo, hi = _grid_bounds(ctx.protocol, space, cont)
    span = np.where(hi - lo > 0, hi - lo, 1.0)
    values_at = lambda X: _values_at(ctx, X, mode, inc_value, rank_kw, rule, rescue)
    out = []
    for i in top:
        x0 = X_pool[i].copy()
        cons = _linear_constraints(space, x0, cont, lo, span)
        fun, jac, cfun, cjac = _problem(values_at, x0, cont, lo, span)
        if not rescue:
            cons.append({"type": "ineq", "fun": cfun, "jac": cjac})
        u0 = (x0[cont] - lo) / span
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                res = minimize(fun, u0, jac=jac, method="SLSQP", bounds=[(0.0, 1.0)] * cont.size,
                               constraints=cons, options={"maxiter": 60, "ftol": 1e-7})
        except (ValueError, np.linalg.LinAlgError, ModelError):
            continue
        if (not res.success and not rescue) or res.fun >= fun(u0):
            continue  # keep only refinements that converged (rescue: any) and improved the score
        x = x0.copy()
        x[cont] = lo + span * np.clip(res.x, 0.0, 1.0)
        if not np.all(np.isfinite(x)):
            continue
        # SLSQP may stop a hair outside a linear rule it kept: back along the way it came
        x = last_good_point(lambda z: bool(np.asarray(space.contains(z[None, :]))[0]), x0, x)
        if not np.array_equal(x, x0):
            out.append(x)
    return np.array(out).reshape(-1, X_pool.shape[1])
