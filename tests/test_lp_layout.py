"""The design space's LPs, built without cvxpy, are the very problems cvxpy built before.

Each LP of :mod:`guardband.planner.space.lp` must hand scipy's HiGHS the same
arrays as cvxpy's SCIPY interface does for the cvxpy problem it replaces
(``Problem.get_problem_data``), so that the solutions, and every plan, stay
the same bit for bit. The reference here is cvxpy itself (the version pinned
in constraints.txt), solving the original formulations kept in the modules
as the CLARABEL fallback.
"""

from __future__ import annotations

import numpy as np
import pytest

cp = pytest.importorskip("cvxpy")

from guardband.planner.space import DesignSpace  # noqa: E402
from guardband.planner.space import feasibility, lp, slices  # noqa: E402


def _same(a, b) -> bool:
    """Equal bit for bit: dense vectors, or sparse matrices with the same storage."""
    if a is None or b is None:
        return a is None and b is None
    if hasattr(a, "indptr"):
        return (type(a) is type(b) and a.shape == b.shape and a.format == b.format
                and all(np.asarray(getattr(a, k)).tobytes() == np.asarray(getattr(b, k)).tobytes()
                        for k in ("indptr", "indices", "data")))
    a, b = np.asarray(a), np.asarray(b)
    return a.shape == b.shape and a.dtype == b.dtype and a.tobytes() == b.tobytes()


def _assert_layout(problem, built: lp.LP):
    theirs = problem.get_problem_data(cp.SCIPY)[0]
    ours = built.data()
    assert [k for k in ("c", "G", "h", "A", "b") if not _same(theirs[k], ours[k])] == []


def _assert_solution(problem, read, built: lp.LP, used=slice(None), value=False):
    """The same status and the same variables (those the code reads: ``used``), and the
    same optimal value where the code reads it (``value``)."""
    problem.solve(solver="SCIPY")
    found = lp.solve_lp(built, what="a test problem")
    assert found.status == problem.status
    if problem.status in lp.FEASIBLE:
        assert read()[used].tobytes() == found.x[used].tobytes()
        if value:
            assert float(problem.value) == found.value


def _random_box(rng, d):
    lo = rng.uniform(-1.0, 0.0, d)
    lo[rng.random(d) < 0.3] = 0.0  # zeros and negative zeros are where layouts can differ
    lo[rng.random(d) < 0.2] = -0.0
    return lo, lo + rng.uniform(0.0, 2.0, d)


@pytest.mark.parametrize("seed", range(12))
def test_range_lps_match_cvxpy(seed):
    rng = np.random.default_rng(seed)
    d = int(rng.integers(1, 6))
    lo, hi = _random_box(rng, d)
    m_eq, m_ub = int(rng.integers(0, 2)), int(rng.integers(0, 4))
    A_eq, b_eq = np.ones((m_eq, d)), np.full(m_eq, float(np.sum(lo + hi) / 2))
    A_ub = rng.normal(size=(m_ub, d))
    A_ub[rng.random((m_ub, d)) < 0.3] = 0.0
    b_ub = rng.uniform(0.0, 1.0, m_ub)
    space = DesignSpace(tuple(f"x{i}" for i in range(d)), lo, hi, A_eq, b_eq, A_ub, b_ub)
    for j in range(d):
        for sign in (1.0, -1.0):
            c = sign * np.eye(d)[j]
            problem, read = feasibility._ranges_problem(space, c)
            built = lp.ranges_lp(c, *space._relaxed_bounds, space.A_eq, space.b_eq, space.A_ub, space.b_ub)
            _assert_layout(problem, built)
            _assert_solution(problem, read, built)


@pytest.mark.parametrize("seed", range(12))
def test_centre_and_support_lps_match_cvxpy(seed):
    rng = np.random.default_rng(100 + seed)
    k, m = int(rng.integers(1, 5)), int(rng.integers(1, 6))
    G = rng.normal(size=(m, k))
    G[rng.random((m, k)) < 0.2] = 0.0
    G[0, 0] = -0.0
    G = np.vstack([G, np.eye(k), -np.eye(k)])  # a slice is bounded: its box rows
    gnorm = np.linalg.norm(G, axis=1)
    gnorm[gnorm == 0] = 1.0
    h = rng.uniform(-0.2, 2.0, G.shape[0])
    t_mid = rng.normal(size=k)
    t_mid[0] = 0.0
    cases = [
        (slices._chebyshev_problem(G, gnorm, h), lp.chebyshev_lp(G, gnorm, h), slice(None), False),
        # the norm's auxiliary variables (the first k) are not read
        (slices._nearest_centre_problem(G, h, t_mid), lp.nearest_centre_lp(G, h, t_mid), slice(k, None), False),
        # the flat-direction check reads the support LP's value
        (slices._support_problem(G[-1], G, h + 1e-9), lp.support_lp(G[-1], G, h + 1e-9), slice(None), True),
    ]
    for (problem, read), built, used, value in cases:
        _assert_layout(problem, built)
        _assert_solution(problem, read, built, used, value)


@pytest.mark.parametrize("seed", range(8))
def test_emptiness_lps_match_cvxpy(seed):
    rng = np.random.default_rng(200 + seed)
    d = int(rng.integers(1, 5))
    lo, hi = _random_box(rng, d)
    A_ub = rng.normal(size=(2, d))
    b_ub = rng.normal(size=2)  # sometimes empty
    levels = {d - 1: np.array([lo[-1], hi[-1]])} if seed % 2 else {}
    space = DesignSpace(tuple(f"x{i}" for i in range(d)), lo, hi, np.ones((1, d)),
                        [float(np.sum(lo) + 0.5 * np.sum(hi - lo))], A_ub, b_ub, levels=levels)
    for active in (np.ones(len(space.groups), bool), rng.random(len(space.groups)) < 0.6):
        problem = feasibility._feasibility_problem(space, active, exact_levels=False)
        built = feasibility._feasibility_lp(space, active)
        if problem is None:
            assert built is None
            continue
        _assert_layout(problem, built)
        problem.solve(solver="SCIPY")
        assert lp.solve_lp(built, what="a test problem").status == problem.status


def test_statuses_are_cvxpys():
    assert lp.FEASIBLE == (cp.OPTIMAL, cp.OPTIMAL_INACCURATE)
    assert lp.INFEASIBLE == (cp.INFEASIBLE, cp.INFEASIBLE_INACCURATE)


@pytest.mark.parametrize("seed", range(8))
def test_level_checks_match_cvxpy(seed):
    # discrete factors at one of their levels: cvxpy's boolean picks, solved by scipy's milp
    rng = np.random.default_rng(300 + seed)
    d = int(rng.integers(2, 4))
    levels = {0: np.array([0.0, 0.2, 1.0]), d - 1: np.array([0.25]) if seed % 2 else np.array([-0.0, 0.5])}
    A_ub = np.vstack([np.r_[1.0, 1.0, np.zeros(d - 2)], np.r_[-1.0, np.zeros(d - 1)]])
    space = DesignSpace(tuple(f"x{i}" for i in range(d)), np.zeros(d), np.ones(d), None, None, A_ub,
                        [0.5, -rng.uniform(0.0, 0.4)], levels=levels)
    for active in (np.ones(len(space.groups), bool), rng.random(len(space.groups)) < 0.7):
        if not any(on and g.kind == feasibility.GroupKind.LEVELS for g, on in zip(space.groups, active)):
            continue
        problem = feasibility._feasibility_problem(space, active, exact_levels=True)
        built = feasibility._feasibility_milp(space, active)
        _assert_layout(problem, built)
        theirs = problem.get_problem_data(cp.SCIPY)[0]
        assert _same(theirs["lower_bounds"], built.lower_bounds()) and theirs["upper_bounds"] is None
        assert theirs["bool_vars_idx"] == list(range(built.first_boolean, built.c.size))
        problem.solve(solver="SCIPY")
        assert lp.solve_milp(built, what="a test problem").status == problem.status
