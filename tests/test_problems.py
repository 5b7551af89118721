"""Test problems: stated optima, published facts about Gramacy et al. (2016), noise models."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy.optimize import minimize

from guardband.planner.simulation import PROBLEMS, get_problem, locate_optimum
from guardband.planner.simulation.problems import DOSE_COHORT
from guardband.safety.limits import met_every_limit

NAMES = sorted(PROBLEMS)


def _sign(problem) -> float:
    return -1.0 if problem.protocol.maximize else 1.0


def _dense_points(problem, n: int, seed: int) -> np.ndarray:
    """An independent dense set of points: every level combination, or a sample."""
    space = problem.protocol.design_space()
    if space.levels and len(space.levels) == space.n_factors:
        grid = np.array(list(itertools.product(*[space.levels[j] for j in range(space.n_factors)])))
        return grid[np.asarray(space.contains(grid))]
    return space.sample(n, rng=np.random.default_rng(seed))


@pytest.mark.parametrize("name", NAMES)
def test_stated_optimum_is_feasible_and_attained(name):
    problem = PROBLEMS[name]
    protocol = problem.protocol
    x = np.array(problem.optimum_x, dtype=float)[None, :]
    assert np.asarray(protocol.design_space().contains(x))[0]
    y = problem.evaluate(x)
    assert met_every_limit(protocol, y)[0]
    assert y[protocol.objective.name][0] == pytest.approx(problem.optimum, rel=1e-12, abs=1e-12)


@pytest.mark.parametrize("name", NAMES)
def test_no_dense_feasible_point_beats_the_stated_optimum(name):
    # an independent sample (seed 12345, not the one locate_optimum uses)
    problem = PROBLEMS[name]
    protocol = problem.protocol
    X = _dense_points(problem, 100_000, seed=12345)
    Y = problem.evaluate(X)
    ok = met_every_limit(protocol, Y)
    assert ok.sum() >= 1
    s = _sign(problem)
    best_sampled = np.min(s * Y[protocol.objective.name][ok])
    # the sample may come close but never better (1e-9 relative for rounding)
    assert best_sampled >= s * problem.optimum - 1e-9 * max(1.0, abs(problem.optimum))


@pytest.mark.parametrize("name", NAMES)
def test_locate_optimum_recomputes_the_stated_value(name):
    problem = PROBLEMS[name]
    found = locate_optimum(problem, n_samples=40_000, n_polish=8, seed=7)
    # SLSQP from a different, smaller sample lands on the same optimum
    assert found.value == pytest.approx(problem.optimum, rel=1e-6)
    assert met_every_limit(problem.protocol, problem.evaluate(found.x[None, :]))[0]


def test_get_problem_names_the_choices():
    with pytest.raises(ValueError, match="built-in problems: coating, dose, gramacy, tablet"):
        get_problem("nope")


# ------------------------------------------------ Gramacy et al. (2016)
def test_gramacy_feasible_share_is_about_46_percent():
    # Gramacy et al. (2016), Technometrics 58(1):1-11: about 46% of the unit
    # square is feasible (from memory). Monte Carlo with 400 000 uniform
    # points has a standard error of 0.0008; "about 46%" is read as +-1%.
    problem = PROBLEMS["gramacy"]
    U = np.random.default_rng(2016).random((400_000, 2))
    share = met_every_limit(problem.protocol, problem.evaluate(U)).mean()
    assert abs(share - 0.46) < 0.01


def test_gramacy_global_optimum_matches_the_value_from_memory():
    # global optimum about 0.5998 at about (0.1954, 0.4044) (from memory)
    problem = PROBLEMS["gramacy"]
    assert problem.optimum == pytest.approx(0.5998, abs=1e-4)
    assert np.allclose(problem.optimum_x, (0.1954, 0.4044), atol=1e-3)


def test_gramacy_local_minimum_at_0_075_is_feasible():
    # local minimum 0.75 at (0, 0.75), feasible (from memory). There c1 is 0
    # analytically (sin(-3 pi) = 0), so feasibility holds to rounding.
    problem = PROBLEMS["gramacy"]
    y = problem.evaluate(np.array([[0.0, 0.75]]))
    assert y["f"][0] == pytest.approx(0.75)
    assert y["c1"][0] <= 1e-12 and y["c2"][0] <= 0.0
    # a local minimum: no feasible point within 0.03 of it is better
    rng = np.random.default_rng(3)
    X = np.clip(np.array([0.0, 0.75]) + rng.uniform(-0.03, 0.03, size=(20_000, 2)), 0.0, 1.0)
    Y = problem.evaluate(X)
    ok = met_every_limit(problem.protocol, Y)
    assert ok.sum() > 100
    assert np.min(Y["f"][ok]) >= 0.75 - 1e-9


def test_gramacy_third_local_minimum_near_0_861():
    # another feasible local minimum, about 0.861 near (0.720, 0.141) (from
    # memory); scipy SLSQP from that point stays there
    problem = PROBLEMS["gramacy"]

    def c(x, name):
        return -problem.evaluate(np.asarray(x)[None, :])[name][0]

    res = minimize(lambda x: x[0] + x[1], np.array([0.72, 0.141]), method="SLSQP",
                   bounds=[(0, 1), (0, 1)],
                   constraints=[{"type": "ineq", "fun": c, "args": (n,)} for n in ("c1", "c2")])
    assert res.success
    assert res.fun == pytest.approx(0.861, abs=2e-3)
    assert np.allclose(res.x, (0.720, 0.141), atol=5e-3)


# ------------------------------------------------ invented problems
def test_tablet_limit_crosses_the_best_region():
    # the best blend ignoring the degradant limit breaks it; the optimum sits on the limit
    problem = PROBLEMS["tablet"]
    protocol = problem.protocol
    X = protocol.design_space().sample(50_000, rng=np.random.default_rng(1))
    Y = problem.evaluate(X)
    best = int(np.argmax(Y["dissolution"]))
    assert not met_every_limit(protocol, {k: v[best:best + 1] for k, v in Y.items()})[0]
    at_opt = problem.evaluate(np.array([problem.optimum_x]))
    assert at_opt["degradant"][0] == pytest.approx(0.2, abs=1e-6)
    assert np.allclose(np.sum(problem.optimum_x), 1.0)


def test_coating_feasible_region_is_narrow():
    problem = PROBLEMS["coating"]
    assert len(problem.protocol.factors) >= 6
    X = problem.protocol.design_space().sample(100_000, rng=np.random.default_rng(2))
    share = met_every_limit(problem.protocol, problem.evaluate(X)).mean()
    assert 0.005 < share < 0.10


def test_dose_toxicity_is_logistic_and_the_start_region_is_safe():
    problem = PROBLEMS["dose"]
    protocol = problem.protocol
    space = protocol.design_space()
    grid = _dense_points(problem, 0, 0)
    tox = problem.evaluate(grid)["tox_rate"]
    assert np.all((tox > 0) & (tox < 1))
    # logit(tox) is linear in each dose at a fixed level of the other
    logit = np.log(tox / (1 - tox))
    for b in np.unique(grid[:, 1]):
        row = grid[:, 1] == b
        slope = np.polyfit(grid[row, 0], logit[row], 1, full=True)
        assert slope[1].size == 0 or slope[1][0] < 1e-18
    A, bvec, _ = protocol.start_rows()
    inside = np.all(grid @ A.T <= bvec + 1e-12, axis=1)
    assert inside.sum() >= 4
    assert met_every_limit(protocol, problem.evaluate(grid[inside])).all()
    assert space.levels


def test_binomial_measurement_of_a_rate():
    problem = PROBLEMS["dose"]
    truth = problem.evaluate(np.array([[25.0, 3.0]] * 4000))
    kept = {k: v.copy() for k, v in truth.items()}
    m = problem.measure(truth, np.random.default_rng(0), scale=1.0)
    counts = m["tox_rate"] * DOSE_COHORT
    assert np.allclose(counts, np.round(counts)) and counts.min() >= 0 and counts.max() <= DOSE_COHORT
    # mean of Binomial(n, p)/n is p; 4000 cohorts give a standard error below 0.003
    assert abs(m["tox_rate"].mean() - truth["tox_rate"][0]) < 0.015
    assert all(np.array_equal(kept[k], truth[k]) for k in truth)  # truth not modified
    off = problem.measure(truth, np.random.default_rng(0), scale=0.0)
    assert all(np.array_equal(off[k], truth[k]) for k in truth)


def test_gaussian_measurement_noise_has_the_stated_sd():
    problem = PROBLEMS["tablet"]
    truth = problem.evaluate(np.array([problem.optimum_x] * 20_000))
    m = problem.measure(truth, np.random.default_rng(1), scale=2.0)
    # sd 1.0 at scale 1; scale 2 doubles it (sample sd within 3%)
    assert np.std(m["dissolution"] - truth["dissolution"]) == pytest.approx(2.0, rel=0.03)
    m2 = problem.measure(truth, np.random.default_rng(1), scale=1.0, noise={"dissolution": 0.5})
    assert np.std(m2["dissolution"] - truth["dissolution"]) == pytest.approx(0.5, rel=0.03)


def test_the_best_sample_of_each_level_combination_in_order():
    from guardband.planner.simulation.problems import _best_of_each_combination

    # rows by hand: level columns 1 and 2; order = best first
    X = np.array([[0.1, 1, 0], [0.2, 2, 0], [0.3, 1, 0], [0.4, 1, 1], [0.5, 2, 0]])
    order = np.array([4, 2, 0, 3, 1])
    # first of (2,0) is row 4, of (1,0) row 2, of (1,1) row 3
    assert _best_of_each_combination(X, order, [1, 2]) == [4, 2, 3]
