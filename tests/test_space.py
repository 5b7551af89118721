"""Design space: checks against scipy, conflict reports, sampler uniformity and feasibility."""

from __future__ import annotations

import json
import re

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import optimize, stats
from scipy.linalg import null_space

from guardband.planner.errors import ProtocolError
from guardband.planner.space import DesignSpace

TOL = 1e-9  # the feasibility promise of the sampler and the projection


# ----------------------------------------------------------------- spaces
def simplex(q: int, total: float = 1.0) -> DesignSpace:
    return DesignSpace(
        tuple(f"c{i + 1}" for i in range(q)), np.zeros(q), np.full(q, total),
        A_eq=np.ones((1, q)), b_eq=[total], eq_labels=("mixture total",),
    )


def thin_mixture() -> DesignSpace:
    """Ten components in bands 0.03 wide whose lower bounds sum to 0.9, two ratio limits."""
    lower = np.array([0.30, 0.20, 0.10, 0.08, 0.06, 0.05, 0.04, 0.03, 0.02, 0.02])
    A_ub = np.zeros((2, 10))
    A_ub[0, [0, 1]] = [-1.0, 1.4]  # c1 >= 1.4 c2
    A_ub[1, [2, 3]] = [-1.0, 1.0]  # c4 <= c3
    return DesignSpace(
        tuple(f"c{i + 1}" for i in range(10)), lower, lower + 0.03,
        A_eq=np.ones((1, 10)), b_eq=[1.0], A_ub=A_ub, b_ub=[0.0, 0.0],
        eq_labels=("mixture total",), ub_labels=("c1 >= 1.4 c2", "c4 <= c3"),
    )


def sliver() -> DesignSpace:
    """The band 0 <= x - y <= 1e-4 across the unit square."""
    return DesignSpace(("x", "y"), [0, 0], [1, 1], A_ub=[[1, -1], [-1, 1]], b_ub=[1e-4, 0],
                       ub_labels=("x - y <= 1e-4", "x >= y"))


def sliver_mixture() -> DesignSpace:
    """Three components with the ratio a / b held in [2, 2 + 1e-4]."""
    return DesignSpace(("a", "b", "c"), [0, 0, 0], [1, 1, 1], A_eq=[[1, 1, 1]], b_eq=[1],
                       A_ub=[[-1, 2, 0], [1, -2.0001, 0]], b_ub=[0, 0],
                       eq_labels=("mixture total",), ub_labels=("a >= 2 b", "a <= 2.0001 b"))


def flat_ratio() -> DesignSpace:
    """a == 2 b written as two inequalities: the polytope has no interior in its hull."""
    return DesignSpace(("a", "b", "c"), [0, 0, 0], [1, 1, 1], A_eq=[[1, 1, 1]], b_eq=[1],
                       A_ub=[[1, -2, 0], [-1, 2, 0]], b_ub=[0, 0])


def with_fixed() -> DesignSpace:
    """An active ingredient fixed at 0.1 inside a four-component mixture."""
    return DesignSpace(("api", "mcc", "lactose", "binder"), [0.1, 0.2, 0.1, 0.0],
                       [0.1, 0.8, 0.7, 0.1], A_eq=[[1, 1, 1, 1]], b_eq=[1],
                       A_ub=[[0, -1, 2, 0]], b_ub=[0.2], eq_labels=("mixture total",),
                       ub_labels=("2 lactose - mcc <= 0.2",))


def dose_space() -> DesignSpace:
    """Two discrete doses and a continuous two-part vehicle; a rule ties dose_b to the vehicle."""
    return DesignSpace(
        ("dose_a", "dose_b", "oil", "water"), [0, 0, 0, 0], [40, 40, 1, 1],
        A_eq=[[0, 0, 1, 1]], b_eq=[1],
        A_ub=[[1, 1, 0, 0], [0, 1, -30, 0]], b_ub=[50, 0],
        eq_labels=("vehicle total",), ub_labels=("dose_a + dose_b <= 50", "dose_b <= 30 oil"),
        levels={0: [5, 10, 20, 40], 1: [0, 10, 25, 40]},
    )


SPACES = {
    "thin 10-component mixture": thin_mixture,
    "sliver 1e-4": sliver,
    "sliver ratio mixture": sliver_mixture,
    "flat ratio": flat_ratio,
    "fixed factor": with_fixed,
    "discrete levels": dose_space,
}


def max_violation(space: DesignSpace, X: np.ndarray) -> float:
    """Largest violation of any rule, computed from the arrays directly."""
    v = [np.max(space.lower - X), np.max(X - space.upper)]
    if space.A_eq.shape[0]:
        v.append(np.max(np.abs(X @ space.A_eq.T - space.b_eq)))
    if space.A_ub.shape[0]:
        v.append(np.max(X @ space.A_ub.T - space.b_ub))
    for j, lv in space.levels.items():
        v.append(np.max(np.min(np.abs(X[:, j, None] - lv[None, :]), axis=1)))
    return float(max(v))


def random_space(rng: np.random.Generator, d: int) -> DesignSpace:
    """Random box, a mixture over a random subset and one inequality, all through x_star."""
    lower = rng.uniform(-1, 1, d)
    upper = lower + rng.uniform(0.2, 2.0, d)
    x_star = lower + (upper - lower) * rng.uniform(0.2, 0.8, d)
    mix = rng.choice(d, size=int(rng.integers(2, d + 1)), replace=False)
    A_eq = np.zeros((1, d))
    A_eq[0, mix] = 1.0
    a = rng.standard_normal(d)
    return DesignSpace(tuple(f"x{i}" for i in range(d)), lower, upper, A_eq=A_eq,
                       b_eq=[x_star[mix].sum()], A_ub=a[None, :],
                       b_ub=[a @ x_star + rng.uniform(0.0, 0.5)])


# ----------------------------------------------------------- construction
def test_arrays_are_copied_and_read_only():
    lower, upper, A = np.zeros(3), np.ones(3), np.ones((1, 3))
    space = DesignSpace(("a", "b", "c"), lower, upper, A_eq=A, b_eq=[1.0])
    lower[0] = 5.0
    A[0, 0] = 7.0
    assert space.lower[0] == 0.0 and space.A_eq[0, 0] == 1.0
    with pytest.raises(ValueError):
        space.upper[0] = 2.0
    assert space.A_ub.shape == (0, 3) and space.eq_labels == ("equality 1",)


@pytest.mark.parametrize(
    "kwargs, match",
    [
        (dict(lower=[0, 0], upper=[1, 1, 1]), "lower must have shape (3,)"),
        (dict(A_eq=[[1, 1]], b_eq=[1]), "A_eq must have shape (m, 3)"),
        (dict(A_ub=[[1, 1, 1]], b_ub=[1, 2]), "b_ub must have shape (1,)"),
        (dict(A_ub=[[1, 1, 1]], b_ub=[1], ub_labels=("x", "y")), "ub_labels needs 1 labels"),
        (dict(levels={5: [1, 2]}), "levels key 5 is not a factor index"),
        (dict(upper=[1, np.inf, 1]), "upper must be finite"),
    ],
    ids=["lower", "A_eq", "b_ub", "labels", "levels", "finite"],
)
def test_bad_shapes_raise_value_error(kwargs, match):
    args = dict(names=("a", "b", "c"), lower=[0, 0, 0], upper=[1, 1, 1]) | kwargs
    with pytest.raises(ValueError, match=re.escape(match)):
        DesignSpace(**args)


def test_index_of_unknown_factor_names_the_factors():
    with pytest.raises(ProtocolError, match=re.escape("unknown factor 'talc'; the factors are: c1, c2")):
        simplex(2).index("talc")


# -------------------------------------------------------------- membership
def test_contains_violations_and_descriptions():
    space = with_fixed()
    inside = np.array([0.1, 0.5, 0.3, 0.1])
    cases = {
        "": inside,
        "bounds of binder": np.array([0.1, 0.5, 0.2, 0.2]),
        "mixture total": np.array([0.1, 0.5, 0.3, 0.05]),
        "2 lactose - mcc <= 0.2": np.array([0.1, 0.3, 0.5, 0.1]),
    }
    X = np.array(list(cases.values()))
    assert space.contains(X).tolist() == [True, False, False, False]
    V = space.violations(X)
    assert V.shape == (4, len(space.group_labels))
    np.testing.assert_allclose(V[0], 0.0, atol=1e-15)
    for label, x in cases.items():
        text = space.describe_violation(x)
        assert text.startswith(label) if label else text == ""
    # The 1e-9 tolerance is absolute for rules of magnitude <= 1.
    assert space.contains(inside + np.array([0, 4e-10, 0, 0]))[0]
    assert not space.contains(inside + np.array([0, 4e-9, 0, 0]))[0]


def test_discrete_factor_must_sit_on_a_level():
    space = dose_space()
    x = np.array([10.0, 10.0, 0.5, 0.5])
    assert space.contains(x)[0]
    x[0] = 12.0
    assert not space.contains(x)[0]
    assert space.describe_violation(x).startswith("levels of dose_a: dose_a = 12")


# ------------------------------------------------------------ infeasibility
def test_mixture_lower_bounds_above_total_name_total_and_bounds():
    space = DesignSpace(("a", "b", "c"), [0.5, 0.4, 0.3], [1, 1, 1], A_eq=[[1, 1, 1]],
                        b_eq=[1], eq_labels=("mixture total",))
    chk = space.check()
    assert chk.empty and chk.dimension == -1
    assert set(chk.conflicts) == {"mixture total", "bounds of a", "bounds of b", "bounds of c"}
    assert "mixture total" in chk.message
    with pytest.raises(ProtocolError, match="the design space is empty"):
        space.sample(10, rng=0)
    with pytest.raises(ProtocolError, match="mixture total"):
        space.project(np.array([0.3, 0.3, 0.4]))
    json.dumps(chk.to_dict(), allow_nan=False)  # NaN ranges become null


def test_ratio_rule_contradicting_a_bound_is_named():
    rule = "constraint 'binder ratio': mcc - 2*lactose >= 0"
    space = DesignSpace(("mcc", "lactose", "api"), [0.0, 0.4, 0.1], [0.5, 0.9, 0.1],
                        A_eq=[[1, 1, 1]], b_eq=[1], A_ub=[[-1, 2, 0]], b_ub=[0],
                        eq_labels=("mixture total",), ub_labels=(rule,))
    chk = space.check()
    assert chk.empty
    assert rule in chk.conflicts
    assert "bounds of api" not in chk.conflicts  # removing it alone does not help


def test_lower_above_upper_names_the_factor():
    space = DesignSpace(("a", "b"), [0.6, 0.0], [0.4, 1.0])
    chk = space.check()
    assert chk.empty and chk.conflicts == ("bounds of a",)


def _linprog_feasible(space: DesignSpace, groups: set[str]) -> bool:
    """Reference library: scipy.optimize.linprog feasibility of a subset of groups."""
    d = space.n_factors
    bounds = [(None, None)] * d
    for j, name in enumerate(space.names):
        if f"bounds of {name}" in groups:
            bounds[j] = (space.lower[j], space.upper[j])
    eq = [i for i, lab in enumerate(space.eq_labels) if lab in groups]
    ub = [i for i, lab in enumerate(space.ub_labels) if lab in groups]
    res = optimize.linprog(
        np.zeros(d), A_ub=space.A_ub[ub] if ub else None, b_ub=space.b_ub[ub] if ub else None,
        A_eq=space.A_eq[eq] if eq else None, b_eq=space.b_eq[eq] if eq else None,
        bounds=bounds, method="highs",
    )
    return res.status == 0


def test_no_single_culprit_gives_an_irreducible_infeasible_subset():
    # Two independent reasons: x <= 0.2 and x <= 0.3 each contradict x >= 0.6, and
    # the bounds [0.5, 1] contradict both upper rules too.
    space = DesignSpace(("x", "y"), [0.5, 0.0], [1.0, 1.0], A_ub=[[1, 0], [1, 0], [-1, 0]],
                        b_ub=[0.2, 0.3, -0.6], ub_labels=("x <= 0.2", "x <= 0.3", "x >= 0.6"))
    chk = space.check()
    assert chk.empty and "no single constraint" in chk.message
    iis = set(chk.conflicts)
    assert iis
    assert not _linprog_feasible(space, iis)
    for label in iis:  # irreducible: every proper subset by one is feasible
        assert _linprog_feasible(space, iis - {label})


def test_levels_that_miss_every_allowed_value_are_reported():
    space = DesignSpace(("dose", "v"), [0, 0], [4, 1], A_ub=[[-1, 0], [1, 0]], b_ub=[-1.5, 2.5],
                        ub_labels=("dose >= 1.5", "dose <= 2.5"), levels={0: [1, 3]})
    chk = space.check()
    assert chk.empty
    assert "no combination of the discrete levels is feasible" in chk.message
    assert "levels of dose" in chk.conflicts


# ------------------------------------------------------ ranges and centre
@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_ranges_agree_with_linprog(seed):
    space = random_space(np.random.default_rng(seed), 5)
    chk = space.check()
    assert not chk.empty
    for j in range(space.n_factors):
        c = np.zeros(space.n_factors)
        c[j] = 1.0
        kw = dict(A_ub=space.A_ub, b_ub=space.b_ub, A_eq=space.A_eq, b_eq=space.b_eq,
                  bounds=list(zip(space.lower, space.upper)), method="highs")
        lo = optimize.linprog(c, **kw)  # reference library
        hi = optimize.linprog(-c, **kw)
        np.testing.assert_allclose(chk.ranges[j], [lo.fun, -hi.fun], atol=1e-8)


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_centre_is_inside_and_its_ball_fits(seed):
    space = random_space(np.random.default_rng(seed), 5)
    chk = space.check()
    assert space.contains(chk.centre)[0]
    assert chk.radius > 0.0
    # Radius in unit-scaled coordinates within the affine hull of the equalities.
    w = chk.ranges[:, 1] - chk.ranges[:, 0]
    N = null_space(space.A_eq * w)
    rng = np.random.default_rng(100 + seed)
    for _ in range(200):
        u = N @ rng.standard_normal(N.shape[1])
        x = chk.centre + w * u / np.linalg.norm(u) * chk.radius * (1 - 1e-7)
        assert space.contains(x)[0]
    # The largest radius is unique even when the centre is not: compare it with an
    # independent Chebyshev LP (reference library linprog) in the same coordinates.
    lo = chk.ranges[:, 0]
    z0 = np.linalg.lstsq(space.A_eq * w, space.b_eq - space.A_eq @ lo, rcond=None)[0]
    C = np.vstack([space.A_ub * w, np.eye(5), -np.eye(5)])
    d = np.concatenate([space.b_ub - space.A_ub @ lo, (space.upper - lo) / w,
                        -(space.lower - lo) / w])
    G, h = C @ N, d - C @ z0
    res = optimize.linprog(np.r_[np.zeros(N.shape[1]), -1.0],
                           A_ub=np.c_[G, np.linalg.norm(G, axis=1)], b_ub=h,
                           bounds=[(None, None)] * N.shape[1] + [(None, 1.0)], method="highs")
    assert res.status == 0
    np.testing.assert_allclose(chk.radius, -res.fun, rtol=1e-5)


def test_flat_polytope_keeps_its_dimension():
    space = flat_ratio()
    chk = space.check()
    assert not chk.empty and chk.dimension == 1  # a = 2b and the total leave one direction
    X = space.sample(500, rng=0)
    assert space.contains(X).all()
    assert np.ptp(X[:, 2]) > 0.9  # c runs across [0, 1] along the flat


def test_fixed_factor_is_not_free_and_maps_to_half():
    space = with_fixed()
    assert space.free.tolist() == [False, True, True, True]
    X = space.sample(200, rng=1)
    U = space.to_unit(X)
    np.testing.assert_array_equal(U[:, 0], 0.5)
    assert np.all((U >= -1e-12) & (U <= 1 + 1e-12))
    np.testing.assert_allclose(space.from_unit(U), X, atol=1e-14)
    np.testing.assert_array_equal(X[:, 0], 0.1)  # fixed factors stay at their value


# ---------------------------------------------------------------- sampling
@pytest.mark.parametrize("q", [3, 5])
@pytest.mark.parametrize("chains", ["independent", "four per chain"])
def test_simplex_marginals_are_beta(q, chains):
    # A uniform point on the simplex has Beta(1, q - 1) marginals (trade practice).
    # Independent chains give independent points; with four points per chain the
    # thinning is raised to 25 steps so that they are close to independent.
    n = 4000
    kw = dict(n_chains=n) if chains == "independent" else dict(n_chains=n // 4, thin=25)
    X = simplex(q).sample(n, rng=20240601, **kw)
    for j in range(q):
        assert stats.kstest(X[:, j], stats.beta(1, q - 1).cdf).pvalue > 1e-3


def test_constrained_simplex_matches_rejection_from_dirichlet():
    # Reference: exact uniform points by rejection from Dirichlet(1, 1, 1) (trade practice).
    space = DesignSpace(("a", "b", "c"), [0, 0, 0], [1, 1, 0.6], A_eq=[[1, 1, 1]], b_eq=[1],
                        A_ub=[[-1, 2, 0]], b_ub=[0])  # a >= 2 b, c <= 0.6
    rng = np.random.default_rng(7)
    D = rng.dirichlet(np.ones(3), size=40000)
    D = D[(D[:, 0] >= 2 * D[:, 1]) & (D[:, 2] <= 0.6)][:4000]
    X = space.sample(D.shape[0], rng=8, n_chains=D.shape[0])
    for j in range(3):
        assert stats.ks_2samp(X[:, j], D[:, j]).pvalue > 1e-3


def test_sliver_is_covered_end_to_end():
    # In the band 0 <= x - y <= 1e-4, x is (almost exactly) uniform on [0, 1].
    X = sliver().sample(2000, rng=3, n_chains=2000)
    assert stats.kstest(X[:, 0], "uniform").pvalue > 1e-3


@pytest.mark.parametrize("make", list(SPACES.values()), ids=list(SPACES))
def test_every_sampled_point_is_inside(make):
    space = make()
    X = space.sample(3000, rng=11)
    assert X.shape == (3000, space.n_factors)
    assert space.contains(X, tol=TOL).all()
    assert max_violation(space, X) <= TOL


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_random_polytopes_sample_inside(data):
    d = data.draw(st.integers(2, 6), label="d")
    floats = st.floats(-5, 5, allow_nan=False)
    lower = np.array(data.draw(st.lists(floats, min_size=d, max_size=d), label="lower"))
    width = np.array(data.draw(st.lists(st.one_of(st.just(0.0), st.floats(1e-3, 3)),
                                        min_size=d, max_size=d), label="width"))
    frac = np.array(data.draw(st.lists(st.floats(0.05, 0.95), min_size=d, max_size=d)))
    x_star = lower + width * frac
    mix = data.draw(st.lists(st.integers(0, d - 1), min_size=2, max_size=d, unique=True))
    a = np.array(data.draw(st.lists(st.floats(-3, 3), min_size=d, max_size=d), label="a"))
    slack = data.draw(st.floats(0.0, 1.0), label="slack")
    A_eq = np.zeros((1, d))
    A_eq[0, mix] = 1.0
    space = DesignSpace(tuple(f"x{i}" for i in range(d)), lower, lower + width, A_eq=A_eq,
                        b_eq=[x_star[mix].sum()], A_ub=a[None, :], b_ub=[a @ x_star + slack])
    chk = space.check()
    assert not chk.empty  # x_star is feasible by construction
    assert space.contains(chk.centre)[0]
    X = space.sample(300, rng=0)
    assert space.contains(X, tol=TOL).all()
    fixed = width == 0.0
    np.testing.assert_array_equal(X[:, fixed], np.broadcast_to(lower[fixed], X[:, fixed].shape))


def test_sampling_is_deterministic_for_a_seed():
    space = dose_space()
    A, B = space.sample(500, rng=5), space.sample(500, rng=5)
    np.testing.assert_array_equal(A, B)
    assert not np.array_equal(A, space.sample(500, rng=6))


def test_discrete_samples_use_every_feasible_combination():
    space = dose_space()
    X = space.sample(4000, rng=2)
    combos = {tuple(r) for r in X[:, :2]}
    # Brute force over the level grid: a combination is feasible when its doses meet
    # dose_a + dose_b <= 50 and dose_b <= 30 oil leaves room for oil <= 1.
    expect = {(a, b) for a in (5, 10, 20, 40) for b in (0, 10, 25, 40) if a + b <= 50 and b <= 30}
    assert combos == expect
    assert "of 16 combinations of levels are feasible" in space.check().message


def test_sample_rejects_unknown_method():
    with pytest.raises(ValueError, match="unknown sampling method 'grid'"):
        simplex(3).sample(5, rng=0, method="grid")


# -------------------------------------------------------------- projection
def test_project_returns_an_interior_point():
    space = thin_mixture()
    x = space.sample(1, rng=4)[0]
    np.testing.assert_array_equal(space.project(x), x)


def _slsqp_projection(space: DesignSpace, x: np.ndarray, x0: np.ndarray) -> np.ndarray:
    """Reference library: scipy.optimize.minimize(SLSQP), nearest point in unit-scaled units."""
    r = space.check().ranges
    lo, w = r[:, 0], np.where(space.free, r[:, 1] - r[:, 0], 1.0)
    ux = (x - lo) / w
    Aeq, Aub = space.A_eq * w, space.A_ub * w  # rows acting on u = (y - lo) / w
    beq, bub = space.b_eq - space.A_eq @ lo, space.b_ub - space.A_ub @ lo
    cons = [{"type": "eq", "fun": lambda u: Aeq @ u - beq, "jac": lambda u: Aeq}]
    if space.A_ub.shape[0]:
        cons.append({"type": "ineq", "fun": lambda u: bub - Aub @ u, "jac": lambda u: -Aub})
    res = optimize.minimize(lambda u: np.sum((u - ux) ** 2), (x0 - lo) / w,
                            jac=lambda u: 2 * (u - ux), method="SLSQP",
                            bounds=list(zip((space.lower - lo) / w, (space.upper - lo) / w)),
                            constraints=cons, options={"ftol": 1e-12, "maxiter": 500})
    assert res.success, res.message
    return lo + w * res.x


@pytest.mark.parametrize("make", [thin_mixture, with_fixed], ids=["thin mixture", "fixed factor"])
def test_project_outside_point_matches_slsqp(make):
    space = make()
    rng = np.random.default_rng(9)
    centre = space.check().centre
    for _ in range(5):
        x = centre + rng.normal(scale=0.1, size=space.n_factors)
        assert not space.contains(x)[0]
        y = space.project(x)
        assert space.contains(y, tol=TOL)[0]
        np.testing.assert_allclose(y, _slsqp_projection(space, x, centre), atol=1e-6)


def test_project_snaps_discrete_factors_to_a_feasible_level():
    space = dose_space()
    y = space.project(np.array([12.0, 33.0, 0.1, 0.7]))
    assert space.contains(y, tol=TOL)[0]
    assert y[0] in (5, 10, 20, 40) and y[1] in (0, 10, 25, 40)
    assert y[1] <= 30 * y[2] + 1e-9  # dose_b <= 30 oil


def test_check_to_dict_is_json():
    out = json.loads(json.dumps(thin_mixture().check().to_dict(), allow_nan=False))
    assert out["empty"] is False and len(out["ranges"]) == 10 and out["dimension"] == 9


@pytest.mark.parametrize("make", list(SPACES.values()), ids=list(SPACES))
def test_contains_agrees_with_violations(make):
    # Two paths: the direct membership test and the per-group violation table.
    space = make()
    rng = np.random.default_rng(12)
    X = space.sample(200, rng=13)
    X = np.vstack([X, X + rng.normal(scale=1e-3, size=X.shape),
                   X + rng.normal(scale=1e-9, size=X.shape)])
    via_table = np.array([space.describe_violation(x) == "" for x in X])
    np.testing.assert_array_equal(space.contains(X), via_table)


def test_a_fixed_factor_does_not_set_a_rules_scale():
    """Found by the random-polytope property: 2 x3 + 1e-8 x1 <= 1e-8 * 0.03125 with x3 fixed at 0
    is the rule x1 <= 0.03125; the fixed factor's coefficient must not make it look too thin."""
    lower = np.zeros(4)
    upper = np.array([0.0, 0.125, 0.0, 0.0])
    A_eq = np.array([[1.0, 0.0, 1.0, 0.0]])
    a = np.array([0.0, 1e-8, 0.0, 2.0])
    x_star = np.array([0.0, 0.03125, 0.0, 0.0])
    space = DesignSpace(("x0", "x1", "x2", "x3"), lower, upper, A_eq=A_eq, b_eq=[0.0],
                        A_ub=a[None, :], b_ub=[a @ x_star])
    chk = space.check()
    assert not chk.empty, chk.message
    assert chk.ranges[1, 0] == pytest.approx(0.0, abs=1e-9)
    assert chk.ranges[1, 1] == pytest.approx(0.03125, rel=1e-6)
    X = space.sample(200, rng=0)
    assert space.contains(X, tol=TOL).all() and X[:, 1].max() <= 0.03125 * (1 + 1e-6)


def test_last_good_point_on_a_segment_is_good_and_next_to_the_edge():
    from guardband.planner.space.arrays import last_good_point

    # the half-plane x + y <= 1, from (0, 0) towards (1, 1): the edge is at t = 1/2
    ok = lambda z: z[0] + z[1] <= 1.0
    start, end = np.zeros(2), np.ones(2)
    z = last_good_point(ok, start, end)
    assert ok(z) and 0.0 <= 1.0 - z.sum() <= 2.0 * 2.0**-40  # t within 2^-40 of the edge, on its good side
    inside = np.array([0.2, 0.3])
    assert last_good_point(ok, start, inside) is inside  # a good end is returned as it is
    # a start that is not good and no good point: the start, which the caller must not take as found
    np.testing.assert_array_equal(last_good_point(lambda z: False, start, end), start)

