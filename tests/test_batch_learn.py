"""The learn and boundary batch methods: later picks that learn the limits as well as the objective.

What they maximise (:func:`guardband.planner.step.batch.spread`), inside the
relevant region of the explore method (UCB-PE's pure-exploration half,
Contal, Buffoni, Robicquet & Vayatis 2013, from memory):

* learn: the sum over the objective and each limit of the posterior sd given
  the earlier picks, each over that response's largest sd in the pool (a
  GP's sd far from every run is its prior sd; the scale makes the sum
  free of units). The posterior sd after conditioning is Rasmussen &
  Williams (2006) eq. 2.24; the test below computes the objective's with
  ``GaussianProcess.condition`` and ``predict``, not with the planner's
  rank-one updates.
* boundary: the objective's sd over its scale plus, per limit,
  ``2 sqrt(p (1 - p))``: twice the sd of the Bernoulli indicator "meets the
  limit" (p = probability of meeting it), largest where the limit is a coin
  toss, the idea of the straddle heuristic of Bryan et al. (2005, from
  memory) in units of probability.
"""

import copy
from types import SimpleNamespace

import numpy as np
import pytest

from guardband.planner.inputs.protocol import parse_protocol
from guardband.planner.simulation.loop import runs_table_from_arrays, start_runs
from guardband.planner.simulation.problems import get_problem
from guardband.planner.step import plan_step
from guardband.planner.step.batch import MIN_SEPARATION, response_scales, spread
from guardband.safety.screen import LimitPrediction, step_distance

SEED = 11


def _protocol(with_limits=True, **batch):
    data = copy.deepcopy(get_problem("gramacy").protocol_dict)
    data["batch"] = {**data.get("batch", {}), "size": 4, "pool": 600, "refine": 0, **batch}
    if not with_limits:
        data["limits"] = []
    return parse_protocol(data, source="gramacy, test settings")


@pytest.fixture(scope="module")
def runs():
    problem = get_problem("gramacy")
    p = _protocol()
    X = start_runs(p, 8, rng=np.random.default_rng(3))
    return runs_table_from_arrays(p, X, problem.evaluate(X))


def _lim(sd, status="ok"):
    sd = None if sd is None else np.asarray(sd, dtype=float)
    return LimitPrediction("c", 0.95, None, 0.0, status=status, mean=None if sd is None else 0 * sd, sd=sd)


# ---------------------------------------------------------------- the sums, by hand
def test_response_scales_are_each_responses_largest_sd_and_zero_where_a_limit_cannot_say():
    pool = SimpleNamespace(sd=np.array([0.5, 2.0, 1.0]))
    scales = response_scales(pool, [_lim([1.0, 4.0, 3.0]), _lim(None, status="too-few-runs")])
    assert scales == [2.0, 4.0, 0.0]


def test_learn_adds_each_sd_over_its_scale():
    sd = np.array([1.0, 2.0])
    preds = [_lim([4.0, 0.0]), _lim([0.0, 1.0]), _lim(None, status="model-not-fitted")]
    got = spread("learn", sd, preds, None, [2.0, 8.0, 1.0, 0.0])
    # point 0: 1/2 + 4/8 + 0/1 = 1.0; point 1: 2/2 + 0/8 + 1/1 = 2.0
    assert got.tolist() == [1.0, 2.0]


def test_boundary_adds_twice_the_sd_of_meeting_each_limit():
    sd = np.array([1.0, 1.0, 1.0])
    P = np.array([[0.5, 1.0], [0.9, 0.99], [np.nan, 0.96]])  # NaN: the limit could not vouch
    got = spread("boundary", sd, [], SimpleNamespace(P=P), [2.0])
    want = [0.5 + 1.0 + 0.0, 0.5 + 2 * np.sqrt(0.09) + 2 * np.sqrt(0.0099), 0.5 + 0.0 + 2 * np.sqrt(0.96 * 0.04)]
    assert got == pytest.approx(want, rel=1e-12)


def test_level_adds_twice_the_sd_of_beating_the_level_and_of_meeting_each_limit():
    sd = np.array([1.0, 2.0])
    g0, level = np.array([1.0, 0.0]), 1.0  # q = Phi(0) = 1/2 and Phi(-1/2) = 0.3085375387259869 (scipy)
    P = np.array([[1.0], [0.5]])
    q1 = 0.3085375387259869
    got = spread("level", sd, [], SimpleNamespace(P=P), [g0, level])
    assert got == pytest.approx([1.0 + 0.0, 2 * np.sqrt(q1 * (1 - q1)) + 1.0], rel=1e-12)


def test_explore_is_the_objective_sd_alone():
    sd = np.array([0.3, 0.1])
    assert spread("explore", sd, [_lim([9.0, 9.0])], None, None) is sd


# ---------------------------------------------------------------- the plan
@pytest.mark.parametrize("method", ["learn", "boundary"])
def test_without_limits_the_picks_are_the_explore_methods(runs, method):
    # with the hard rules alone the sum is the objective's sd over a constant: the same argmax
    p = _protocol(with_limits=False, method=method)
    q = _protocol(with_limits=False, method="explore")
    mine = plan_step(p, runs_table_from_arrays(p, runs.X, runs.Y), seed=SEED, explain=False)
    theirs = plan_step(q, runs_table_from_arrays(q, runs.X, runs.Y), seed=SEED, explain=False)
    assert len(mine.proposals) == 4, mine.messages
    assert [r.x.tolist() for r in mine.proposals] == [r.x.tolist() for r in theirs.proposals]


def test_learn_picks_maximise_the_sum_with_the_objective_sd_computed_independently(runs):
    p = _protocol(method="learn")
    result = plan_step(p, runs, seed=SEED, explain=False)
    assert result.mode == "improve" and len(result.proposals) == 4, result.messages
    gp = result.fitted[p.objective.name]
    U = result.unit(result.pool)
    mu, sd0 = gp.predict(U)
    survives = result.screen.survives
    kappa = p.ranking.kappa
    region = survives & (-mu + kappa * sd0 >= np.max(-mu[survives] - kappa * sd0[survives]))
    picks = [result.unit(r.x[None, :]) for r in result.proposals]
    for k in range(1, 4):
        earlier = np.vstack(picks[:k])
        _, sd_k = gp.condition(earlier, gp.predict(earlier)[0]).predict(U)
        j = int(np.argmin(np.linalg.norm(U - picks[k], axis=1)))
        near = np.zeros(U.shape[0], dtype=bool)
        for u in earlier:
            near |= step_distance(U, u[None, :]) < MIN_SEPARATION
        assert region[j] and not near[j]
        reason = result.proposals[k].reason
        assert "the largest sum of sds, objective and limits" in reason
        shown = float(reason.split("in the pool (")[1].split(";")[0])
        # the objective's share of the shown sum, by the independent computation
        own = sd_k[j] / np.max(sd0)
        assert own < shown <= own + len(p.limits) + 1e-9


@pytest.mark.parametrize("method", ["learn", "boundary", "level"])
def test_every_pick_passes_the_screen_on_the_real_models(runs, method):
    p = _protocol(method=method)
    result = plan_step(p, runs, seed=SEED, explain=False)
    assert len(result.proposals) == 4, result.messages
    for prop in result.proposals:
        assert prop.joint >= p.screen.threshold
        assert all(prop.p[lim.name] >= lim.probability for lim in p.limits)


@pytest.mark.parametrize("method", ["learn", "boundary", "level"])
def test_the_plan_is_a_function_of_its_inputs_and_its_first_pick_is_explores(runs, method):
    p = _protocol(method=method)
    one = plan_step(p, runs, seed=SEED, explain=False)
    again = plan_step(p, runs, seed=SEED, explain=False)
    assert one.proposal_dicts() == again.proposal_dicts()
    explore = plan_step(_protocol(method="explore"), runs, seed=SEED, explain=False)
    assert one.proposals[0].x.tolist() == explore.proposals[0].x.tolist()
    # with limits the later picks are not the objective sd's alone
    assert [r.x.tolist() for r in one.proposals[1:]] != [r.x.tolist() for r in explore.proposals[1:]]
