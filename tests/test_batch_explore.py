"""The explore batch method: later picks where the objective is least sure, within the relevant region.

Reference for the rule: the pure-exploration half of UCB-PE (Contal,
Buffoni, Robicquet & Vayatis 2013, "Parallel Gaussian process optimization
with upper confidence bound and pure exploration", from memory): after the
first pick, each pick of the batch maximises the posterior variance given
the earlier picks (which does not depend on their results) over the
relevant region, the points whose upper confidence bound reaches the best
lower confidence bound. The posterior variance after conditioning is
Rasmussen & Williams (2006) eq. 2.24, computed here with
``GaussianProcess.condition`` and ``predict``, not with the planner's
rank-one updates.
"""


import numpy as np
import pytest

from guardband.planner.simulation.loop import runs_table_from_arrays
from guardband.planner.step import plan_step
from guardband.planner.step.batch import MIN_SEPARATION, _choose, relevant_region
from guardband.safety.screen import step_distance

from conftest import gramacy_batch_protocol, gramacy_batch_runs

SEED = 11


def _protocol(with_limits=True, **batch):
    return gramacy_batch_protocol(with_limits=with_limits, **batch)


@pytest.fixture(scope="module")
def runs():
    return gramacy_batch_runs()


# ---------------------------------------------------------------- the region
def test_the_relevant_region_when_maximising():
    # upper bounds 1+2*.5=2, 0.5+2*.1=.7, 1.5+2*.05=1.6, 3+2*.2=3.4 (not a survivor);
    # lower bounds 0, .3, 1.4 (the best among survivors), 2.6 (not a survivor)
    mu, sd = np.array([1.0, 0.5, 1.5, 3.0]), np.array([0.5, 0.1, 0.05, 0.2])
    survives = np.array([True, True, True, False])
    assert relevant_region(mu, sd, survives, 2.0, True).tolist() == [True, False, True, False]


def test_the_relevant_region_when_minimising_is_the_mirror_image():
    mu, sd = np.array([1.0, 0.5, 1.5, 3.0]), np.array([0.5, 0.1, 0.05, 0.2])
    survives = np.array([True, True, True, False])
    # minimising -mu is maximising mu: the same region
    assert relevant_region(-mu, sd, survives, 2.0, False).tolist() == [True, False, True, False]
    # lower bounds 0, .3, 1.4; the best upper bound among survivors is .5+.2=.7
    assert relevant_region(mu, sd, survives, 2.0, False).tolist() == [True, True, False, False]


def test_with_no_survivor_the_region_is_empty_and_kappa_zero_keeps_the_best_mean():
    mu, sd = np.array([1.0, 2.0]), np.array([1.0, 1.0])
    assert not relevant_region(mu, sd, np.array([False, False]), 2.0, True).any()
    assert relevant_region(mu, sd, np.array([True, True]), 0.0, True).tolist() == [False, True]


def test_choose_takes_the_largest_sd_in_the_region_and_falls_back_to_the_score():
    ok = np.array([True, True, True, False])
    scores, sd = np.array([3.0, 1.0, 2.0, 9.0]), np.array([0.1, 0.4, 0.4, 0.9])
    region = np.array([False, True, True, True])
    assert _choose(ok, lambda: scores, sd, region) == (1, 2)  # a tie in sd goes to the lowest index
    assert _choose(ok, lambda: scores, sd, None) == (0, None)
    assert _choose(ok, lambda: scores, sd, np.array([False, False, False, True])) == (0, None)  # none eligible there


# ---------------------------------------------------------------- the plan
def _real_model_view(p, result):
    gp = result.fitted[p.objective.name]
    U = result.unit(result.pool)
    mu, sd = gp.predict(U)
    return gp, U, mu, sd


def test_later_picks_take_the_largest_sd_given_the_earlier_picks_within_the_region(runs):
    p = _protocol(with_limits=False, method="explore")
    result = plan_step(p, runs_table_from_arrays(p, runs.X, runs.Y), seed=SEED, explain=False)
    assert result.mode == "improve" and len(result.proposals) == 4, result.messages
    gp, U, mu, sd = _real_model_view(p, result)
    survives = result.screen.survives
    kappa = p.ranking.kappa
    region = survives & (-mu + kappa * sd >= np.max(-mu[survives] - kappa * sd[survives]))
    assert 1 < region.sum() < survives.sum()  # a region worth the name
    picks = [result.unit(q.x[None, :]) for q in result.proposals]
    for k in range(1, 4):
        earlier = np.vstack(picks[:k])
        _, sd_k = gp.condition(earlier, gp.predict(earlier)[0]).predict(U)
        near = np.zeros(U.shape[0], dtype=bool)
        for u in earlier:
            near |= step_distance(U, u[None, :]) < MIN_SEPARATION
        eligible = region & ~near
        j = int(np.argmin(np.linalg.norm(U - picks[k], axis=1)))
        assert region[j] and not near[j]
        assert sd_k[j] == pytest.approx(np.max(sd_k[eligible]), rel=1e-6)
        assert f"the largest objective sd ({np.max(sd_k[eligible]):.3g}; chosen to learn, not for its ei) " \
               f"among {int(eligible.sum())} candidate(s)" in result.proposals[k].reason


def test_the_first_pick_is_the_sampled_methods_first_pick(runs):
    explore = plan_step(_protocol(method="explore"), runs, seed=SEED, explain=False)
    sampled = plan_step(_protocol(method="sampled"), runs, seed=SEED, explain=False)
    assert explore.proposals[0].x.tolist() == sampled.proposals[0].x.tolist()
    assert [q.x.tolist() for q in explore.proposals[1:]] != [q.x.tolist() for q in sampled.proposals[1:]]


def test_every_explore_pick_passes_the_screen_on_the_real_models(runs):
    p = _protocol(method="explore")
    result = plan_step(p, runs, seed=SEED, explain=False)
    assert len(result.proposals) == 4, result.messages
    for prop in result.proposals:
        assert prop.joint >= p.screen.threshold
        assert all(prop.p[lim.name] >= lim.probability for lim in p.limits)


def test_the_explore_plan_is_a_function_of_its_inputs(runs):
    p = _protocol(method="explore")
    one = plan_step(p, runs, seed=SEED, explain=False)
    again = plan_step(p, runs, seed=SEED, explain=False)
    assert one.proposal_dicts() == again.proposal_dicts()


def test_runs_in_progress_count_as_earlier_picks(runs):
    p = _protocol(method="explore")
    plan = plan_step(p, runs, seed=SEED, explain=False)
    busy = plan.proposals[0].x
    X = np.vstack([runs.X, busy[None, :]])
    Y = {name: np.append(runs.Y[name], np.nan) for name in runs.Y}
    with_busy = plan_step(p, runs_table_from_arrays(p, X, Y), seed=SEED, explain=False)
    assert len(with_busy.proposals) == 4
    u_busy = with_busy.unit(busy[None, :])
    for prop in with_busy.proposals:
        assert step_distance(with_busy.unit(prop.x[None, :]), u_busy)[0] >= MIN_SEPARATION
    assert "and 1 run(s) in progress" in with_busy.proposals[1].reason
    assert "could still be the best" in with_busy.proposals[1].reason
