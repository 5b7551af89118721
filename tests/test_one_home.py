"""One home per idea: the plan, the report and the simulator judge alike.

The report's joint figure and the plan's are one function
(:func:`guardband.safety.screen.figures_at`); "met every limit" is one
function (:func:`guardband.safety.limits.meets_limits`) for the planner's
incumbent and step anchors, the simulator's broken-limit count and the test
problems' optimum search.
"""

from __future__ import annotations

import numpy as np
import pytest

from guardband.planner.inputs.protocol import load_protocol
from guardband.planner.inputs.runs import read_runs
from guardband.planner.report.data import _Geometry
from guardband.planner.simulation import PROBLEMS, best_so_far, get_problem, runs_table_from_arrays
from guardband.planner.step import plan_step, safe_runs_mask
from guardband.safety.limits import LimitRule, limit_rules, meets_limits, met_every_limit

from conftest import PROTOCOLS


@pytest.mark.parametrize("name", ["tablet_blend", "dose_combination"])
def test_report_joint_figure_at_each_proposal_equals_the_plan_tables(name):
    protocol = load_protocol(PROTOCOLS / f"{name}.toml")
    runs = read_runs(PROTOCOLS / f"{name}_runs.csv", protocol)
    result = plan_step(protocol, runs, seed=11, pool_size=300)
    assert result.proposals, "the example protocols must give proposals"
    X = np.array([p.x for p in result.proposals])
    joint_report = _Geometry(result).joint(X)
    P_plan, joint_plan = result.limit_figures(X)
    for k, p in enumerate(result.proposals):
        assert joint_report[k] == pytest.approx(p.joint, abs=1e-12)
        assert joint_plan[k] == pytest.approx(p.joint, abs=1e-12)
        for j, lim in enumerate(protocol.limits):
            assert P_plan[k, j] == pytest.approx(p.p[lim.name], abs=1e-12)


def _random_values(protocol, rng, n):
    """Responses scattered around each limit, with some not measured (NaN)."""
    Y = {protocol.objective.name: rng.normal(size=n)}
    for lim in protocol.limits:
        centre = lim.upper if lim.upper is not None else lim.lower
        y = centre + rng.normal(scale=abs(centre) * 0.3 + 0.1, size=n)
        y[rng.random(n) < 0.1] = np.nan
        y[rng.random(n) < 0.05] = centre  # exactly on the limit: met
        Y[lim.name] = y
    return Y


@pytest.mark.parametrize("name", sorted(PROBLEMS))
def test_simulator_and_planner_agree_on_which_runs_met_every_limit(name):
    problem = get_problem(name)
    protocol = problem.protocol
    rng = np.random.default_rng(5)
    n = 400
    Y = _random_values(protocol, rng, n)
    X = np.tile(np.asarray(problem.optimum_x, dtype=float), (n, 1))
    planner_view = safe_runs_mask(protocol, runs_table_from_arrays(protocol, X, Y))
    simulator_view = met_every_limit(protocol, Y)
    assert np.array_equal(planner_view, simulator_view)
    assert 0 < simulator_view.sum() < n  # both outcomes occur, so the comparison means something
    # written out by hand, from the limits' definitions
    by_hand = np.ones(n, dtype=bool)
    for lim in protocol.limits:
        y = Y[lim.name]
        with np.errstate(invalid="ignore"):
            by_hand &= np.isfinite(y) & ((y <= lim.upper) if lim.upper is not None else True) \
                & ((y >= lim.lower) if lim.lower is not None else True)
    assert np.array_equal(simulator_view, by_hand)
    # the simulator's running best uses the same rule
    best = best_so_far(protocol, Y)
    first = int(np.argmax(simulator_view & np.isfinite(Y[protocol.objective.name])))
    assert np.all(np.isnan(best[:first])) and np.isfinite(best[first])


def test_margin_moves_every_bound_inward():
    rules = (LimitRule("a", None, 1.0, 0.9), LimitRule("b", 0.0, 2.0, 0.9))
    Y = {"a": np.array([0.95, 0.85, 0.85]), "b": np.array([1.0, 0.05, 0.2])}
    assert meets_limits(rules, Y, 3).tolist() == [True, True, True]
    assert meets_limits(rules, Y, 3, margin=0.1).tolist() == [False, False, True]


def test_limit_rules_carry_how_each_limit_is_judged():
    dose = load_protocol(PROTOCOLS / "dose_combination.toml")
    (rule,) = limit_rules(dose)
    assert rule.judged_on == "true-value" and not rule.with_noise
    # a binomial limit's model is on the logit of the rate: its prior mean is the limit's logit
    assert rule.binomial and rule.prior_mean == pytest.approx(np.log(0.25 / 0.75), abs=1e-15)
