"""The planning step end to end on numbers: screen, ranking, batch, fail-closed."""

import numpy as np
import pytest

from guardband.planner.simulation import run_campaign, runs_table_from_arrays
from guardband.planner.errors import ModelError
from guardband.planner.simulation.problems import GRAMACY, gramacy_protocol_dict
from guardband.planner.inputs.protocol import load_protocol, parse_protocol
from guardband.planner.inputs.runs import read_runs
from guardband.planner.step import plan_step, safe_runs_mask

from conftest import PROTOCOLS, unit_square_protocol, with_sections

POOL = 600



@pytest.fixture(scope="module")
def tablet():
    p = load_protocol(PROTOCOLS / "tablet_blend.toml")
    return p, read_runs(PROTOCOLS / "tablet_blend_runs.csv", p)


@pytest.fixture(scope="module")
def dose():
    p = load_protocol(PROTOCOLS / "dose_combination.toml")
    return p, read_runs(PROTOCOLS / "dose_combination_runs.csv", p)


@pytest.fixture(scope="module")
def dose_gaussian(dose):
    """The dose example with its toxicity rate modelled as a Gaussian response (the runs' rates)."""
    p, runs = dose
    data = p.model_dump(mode="python")
    lim = data["limits"][0]
    for key in ("events", "subjects", "monotone"):
        lim.pop(key)
    lim["kind"] = "continuous"
    return parse_protocol(data), runs


@pytest.fixture(scope="module")
def tablet_plan(tablet):
    p, runs = tablet
    return plan_step(p, runs, seed=3, pool_size=POOL)


@pytest.mark.parametrize("which", ["tablet", "dose"])
def test_proposals_meet_hard_constraints_and_screen(which, request):
    p, runs = request.getfixturevalue(which)
    result = plan_step(p, runs, seed=5, pool_size=POOL)
    assert result.proposals, result.messages
    space = p.design_space()
    X = np.array([q.x for q in result.proposals])
    assert np.all(space.contains(X))
    for q in result.proposals:
        assert q.joint >= p.screen.threshold
        for lim in p.limits:
            assert q.p[lim.name] >= lim.probability
        assert q.lo95 <= q.mean <= q.hi95
    # forbidden region of the dose study: never (40 or more of A) and (8 of B)
    if which == "dose":
        assert not np.any((X[:, 0] >= 40) & (X[:, 1] >= 8))


def test_every_candidate_is_survivor_or_excluded(tablet_plan):
    s = tablet_plan.screen
    counts = tablet_plan.counts()
    assert sum(counts.values()) == tablet_plan.pool.shape[0] == s.n
    assert counts["survived"] == int(s.survives.sum())
    for i in np.flatnonzero(~s.survives):
        assert s.reason[i] and s.detail[i]


def test_near_misses_are_ranked_by_the_joint_figure(tablet_plan):
    # ranked by how near a candidate came to passing every limit at once, not
    # by the margin of the first limit that failed (issue 17: a candidate 0.002
    # short on one limit but at 0.38 on another is not a near miss)
    nm = tablet_plan.near_misses()
    assert len(nm) == 20
    keys = [(m["joint"], m["score"]) for m in nm]
    assert keys == sorted(keys, reverse=True)
    s = tablet_plan.screen
    excluded = ~s.survives & (s.reason != "outside-design-space")
    assert nm[0]["joint"] == pytest.approx(float(np.max(s.joint[excluded])))
    assert nm[-1]["joint"] >= float(np.sort(s.joint[excluded])[::-1][19])
    assert all(m["reason"] for m in nm)
    assert all(set(m["p"]) == {"degradant_b", "friability"} for m in nm)


def test_higher_threshold_never_admits(tablet):
    p, runs = tablet
    low = plan_step(with_sections(p, screen={"threshold": 0.80}, batch={"refine": 0}), runs, seed=9, pool_size=POOL)
    high = plan_step(with_sections(p, screen={"threshold": 0.97}, batch={"refine": 0}), runs, seed=9, pool_size=POOL)
    np.testing.assert_array_equal(low.pool, high.pool)
    assert not np.any(high.screen.survives & ~low.screen.survives)
    assert high.screen.survives.sum() < low.screen.survives.sum()


def test_limit_with_too_few_runs_excludes_everything(tablet):
    p, runs = tablet
    strict = with_sections(p, screen={"min_runs": 50, "max_step": None, "span_reach": None})
    result = plan_step(strict, runs, seed=1, pool_size=POOL)
    assert result.proposals == []
    assert set(result.screen.reason) == {"too-few-runs"}
    assert any("cannot vouch" in m for m in result.messages)
    assert any("nothing is proposed" in m for m in result.messages)


def test_feasibility_first_when_no_run_meets_limits(tablet):
    p, runs = tablet
    tight = with_sections(p, screen={"max_step": None})
    data = tight.model_dump(mode="python")
    data["limits"][0]["upper"] = 0.05  # below every measured degradant value
    tight = parse_protocol(data)
    assert not safe_runs_mask(tight, runs).any()
    result = plan_step(tight, runs, seed=2, pool_size=POOL)
    assert result.mode == "feasibility-first"
    assert result.incumbent is None
    assert any("feasibility first" in m for m in result.messages)


def test_feasibility_first_ranks_by_the_joint_figure():
    # every run breaks the limit (imp = 1 - x1 > 0.5 for x1 < 0.5), but the
    # trend puts candidates with x1 beyond 0.6 inside it with some confidence
    # (room for a batch of three even with the limits' pessimistic fantasies)
    protocol = parse_protocol(unit_square_protocol(
        {"name": "imp", "upper": 0.5, "probability": 0.6}, title="no run meets the limit yet",
        screen={"threshold": 0.6, "min_runs": 5}, batch={"size": 3, "pool": POOL, "refine": 0},
        model={"restarts": 2},
    ))
    rng = np.random.default_rng(0)
    X = np.column_stack([rng.uniform(0.0, 0.5, 12), rng.uniform(0.0, 1.0, 12)])
    Y = {"y": np.sin(3.0 * X[:, 1]) + X[:, 0], "imp": 1.0 - X[:, 0] + 0.01 * rng.normal(size=12)}
    runs = runs_table_from_arrays(protocol, X, Y)
    assert not safe_runs_mask(protocol, runs).any()
    result = plan_step(protocol, runs, seed=2)
    assert result.mode == "feasibility-first"
    assert len(result.proposals) == 3, result.messages
    s = result.screen
    # ranked by the joint figure, not by the objective: every candidate's
    # score is its joint figure, the first pick is the best survivor's, and
    # later picks (chosen after fantasised results) are no better than it
    np.testing.assert_array_equal(result.scores, s.joint)
    joints = [q.joint for q in result.proposals]
    assert [q.score for q in result.proposals] == joints
    assert joints[0] == s.joint[s.survives].max()
    assert all(j <= joints[0] for j in joints[1:])


def test_incumbent_is_best_safe_measured(tablet):
    p, runs = tablet
    result = plan_step(p, runs, seed=4, pool_size=POOL)
    safe = safe_runs_mask(p, runs)
    y = runs.Y[p.objective.name]
    assert result.incumbent["value"] == pytest.approx(np.max(y[safe]))
    # a run with a higher objective that breaks a limit does not count
    assert result.incumbent["run_id"] in {runs.run_ids[i] for i in np.flatnonzero(safe)}


def test_objective_with_too_few_runs_is_refused(tablet):
    p, runs = tablet
    small = runs_table_from_arrays(p, runs.X[:2], {k: v[:2] for k, v in runs.Y.items()})
    with pytest.raises(ModelError, match="at least 3 are needed"):
        plan_step(p, small, seed=0, pool_size=POOL)


def test_batch_runs_are_distinct_and_deterministic(tablet):
    p, runs = tablet
    a = plan_step(p, runs, seed=11, pool_size=POOL)
    b = plan_step(p, runs, seed=11, pool_size=POOL)
    Xa = np.array([q.x for q in a.proposals])
    np.testing.assert_array_equal(Xa, np.array([q.x for q in b.proposals]))
    d = np.linalg.norm(Xa[:, None, :] - Xa[None, :, :], axis=2)
    assert np.all(d[np.triu_indices(len(Xa), 1)] > 0)


@pytest.mark.slow
def test_gramacy_campaign_reaches_published_optimum():
    # Gramacy et al. (2016), Technometrics 58(1):1-11: global optimum about
    # 0.5998 (value from memory). 10 starting runs + 30 planned runs, five
    # seeds: the median campaign ends within 2% of it, all but one within 10%.
    # Measured with later picks valued over sampled results (before explore
    # became the default; the bests under explore were not written down) and the search
    # per run: 0.7505, 0.6007, 0.6007, 0.6007, 0.6039 (seed 1 ends in the
    # local basin near 0.75; seeds 4 to 11 all end within 0.7%). Before, with
    # the believer and one search per step, seeds 1 to 3 gave 0.6423, 0.6034,
    # 0.6007.
    protocol = parse_protocol(gramacy_protocol_dict(batch=3))
    bests = []
    for seed in (1, 2, 3, 4, 5):
        history = run_campaign(protocol, GRAMACY.evaluate, n_start=10, budget=30, seed=seed)
        assert history.planned.sum() == 30 and not history.stalled
        assert history.share_broken_planned < 0.10
        bests.append(history.best_safe[-1])
    assert np.median(bests) <= 0.5998 * 1.02
    assert sum(b <= 0.5998 * 1.10 for b in bests) >= len(bests) - 1
    assert min(bests) >= 0.5998 * 0.99  # cannot beat the known optimum by more than rounding


def _joint_at_top(p, runs, cap):
    data = p.model_dump(mode="python")
    data["screen"]["max_step"] = None
    data["screen"]["forbidden"] = []
    data["model"]["limit_length_scale_max"] = cap
    result = plan_step(parse_protocol(data), runs, seed=1, pool_size=POOL)
    X = result.pool
    top = np.flatnonzero((X[:, 0] == 80) & (X[:, 1] == 0))
    assert top.size
    return result.screen.joint[top[0]], result.screen.survives[top[0]]


def test_flat_limit_response_claims_no_safety_far_from_the_runs(dose_gaussian):
    # every cohort so far (doses <= 10 and <= 2) had no dose-limiting
    # toxicity; without the step rule, a Gaussian model that carries that flat 0
    # out to 80 mg/kg would call the top dose safe. The capped limit length
    # scale makes the model return to its prior mean (the limit) there instead.
    p, runs = dose_gaussian
    joint, survives = _joint_at_top(p, runs, 0.4)  # the default
    assert joint < 0.9 and not survives
    joint_uncapped, _ = _joint_at_top(p, runs, 1000.0)  # what the cap prevents
    assert joint_uncapped > joint


def test_binomial_limit_claims_no_safety_at_the_top_dose(dose):
    # the same runs as counts: the binomial model, with or without the cap, does not clear 80 mg/kg
    p, runs = dose
    for cap in (0.4, 1000.0):
        joint, survives = _joint_at_top(p, runs, cap)
        assert joint < 0.9 and not survives


def test_loo_widening_scales_every_sd_by_the_loo_factor_and_keeps_the_mean():
    # Bachoc (2013): the cross-validation variance estimate makes the mean square of the
    # standardised leave-one-out errors exactly 1; the posterior mean does not change
    from guardband.planner.models.gp import Hyperparameters, fit_gp
    from guardband.planner.models.checks import widen_from_loo as _widen_from_loo

    rng = np.random.default_rng(2)
    U = rng.random((25, 2))
    y = np.sin(6 * U[:, 0]) + U[:, 1]
    overconfident = fit_gp(U, y, prior_mean=1.0, hyperparameters=Hyperparameters([0.3, 0.3], 0.01, 1e-6))
    loo = overconfident.loo()
    c_expected = float(np.sqrt(np.mean(loo.residual**2 / loo.variance)))
    assert c_expected > 1.5
    widened, c = _widen_from_loo(overconfident)
    assert c == pytest.approx(c_expected, rel=1e-12)
    after = widened.loo()
    assert np.mean(after.residual**2 / after.variance) == pytest.approx(1.0, rel=1e-9)
    pts = rng.random((50, 2))
    m0, s0 = overconfident.predict(pts, include_noise=True)
    m1, s1 = widened.predict(pts, include_noise=True)
    np.testing.assert_allclose(m1, m0, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(s1, c * s0, rtol=1e-9)
    assert "widened by" in widened.message
    searched = fit_gp(U, y, prior_mean=1.0, rng=0)
    assert searched.used_priors is True
    assert _widen_from_loo(searched)[0].used_priors is True
    assert searched.condition(pts[:2], [0.0, 0.1]).used_priors is True
    # a model that is not overconfident is left alone (never narrowed)
    wide = fit_gp(U, y, prior_mean=1.0, hyperparameters=Hyperparameters([0.3, 0.3], 100.0, 1.0))
    same, c1 = _widen_from_loo(wide)
    assert c1 == 1.0 and same is wide


def test_plan_records_the_widening_of_limit_models_only(tablet):
    protocol, runs = tablet
    plan = plan_step(protocol, runs, seed=1)
    for m in plan.models:
        if m.role == "objective":
            assert m.sd_factor is None
        elif m.status == "ok":
            assert m.sd_factor is not None and m.sd_factor >= 1.0
    off = parse_protocol({**protocol.model_dump(mode="python"),
                          "screen": {**protocol.screen.model_dump(mode="python"), "widen_from_loo": False}})
    plan_off = plan_step(off, runs, seed=1)
    assert all(m.sd_factor is None for m in plan_off.models)


def test_rescue_search_finds_a_passing_point_when_the_pool_has_none(monkeypatch):
    # one safe run in a narrow safe pocket; a small pool with no local candidates
    # misses the pocket; the local search for the joint figure must find a point
    # that passes the full screen (and say so), never relax the screen
    import guardband.planner.step.pool as step_mod
    from guardband.planner.simulation import runs_table_from_arrays

    monkeypatch.setattr(step_mod, "LOCAL_SHARE", 0.0)
    data = {
        "seed": 2,
        "study": {"title": "rescue", "version": "1", "author": "tests"},
        "factors": [{"name": "x1", "kind": "continuous", "lower": 0.0, "upper": 1.0},
                    {"name": "x2", "kind": "continuous", "lower": 0.0, "upper": 1.0}],
        "objective": {"name": "f", "direction": "minimize"},
        "limits": [{"name": "c", "upper": 0.0, "probability": 0.95, "measurement_sd": 0.0}],
        # the single-run check and the tested span would (rightly) refuse a
        # pocket vouched for by one run; they are off here to test the search
        "screen": {"threshold": 0.95, "min_runs": 5, "single_run_check": False, "span_reach": None},
        "batch": {"size": 1, "pool": 50, "refine": 2},
    }
    protocol = parse_protocol(data)
    rng = np.random.default_rng(0)
    X = np.vstack([[0.5, 0.5], rng.random((9, 2))])
    c = 40 * np.sum((X - 0.5) ** 2, axis=1) - 0.5  # safe only within r = 0.11 of the centre
    runs = runs_table_from_arrays(protocol, X, {"f": X.sum(axis=1), "c": c})
    plan = plan_step(protocol, runs, seed=4)
    pool_part = plan.origin != "refined"
    assert not np.any(plan.screen.survives[pool_part])  # the pool alone had nothing
    assert any("local search for the highest probabilities" in m for m in plan.messages)
    assert len(plan.proposals) == 1
    p = plan.proposals[0]
    assert p.origin == "refined" and p.joint >= 0.95
    assert 40 * np.sum((p.x - 0.5) ** 2) - 0.5 < 0  # and it is truly inside the pocket


def test_a_limit_judged_on_the_true_value_leaves_the_noise_out(dose_gaussian):
    from guardband.safety.screen import limit_probability

    p, runs = dose_gaussian
    lim = p.limits[0]
    assert lim.judged_on == "true-value"
    plan = plan_step(p, runs, seed=1, pool_size=POOL)
    model = plan.fitted[lim.name]
    U = plan.unit(plan.pool)
    latent = limit_probability(*model.predict(U, include_noise=False), upper=lim.upper)
    noisy = limit_probability(*model.predict(U, include_noise=True), upper=lim.upper)
    np.testing.assert_allclose(plan.screen.P[:, 0], latent, rtol=1e-12, atol=1e-15)
    # below the limit, the noise can only lower the probability, and here it does
    below = latent > 0.5
    assert np.all(noisy[below] <= latent[below] + 1e-12) and np.any(noisy[below] < latent[below] - 1e-6)
    # the default judges the next measurement: noise included
    data = p.model_dump(mode="python")
    data["limits"][0]["judged_on"] = "measurement"
    measured = plan_step(parse_protocol(data), runs, seed=1, pool_size=POOL)
    Um = measured.unit(measured.pool)
    expected = limit_probability(*measured.fitted[lim.name].predict(Um, include_noise=True), upper=lim.upper)
    np.testing.assert_allclose(measured.screen.P[:, 0], expected, rtol=1e-12, atol=1e-15)


def test_rescue_figure_is_the_log_of_the_product_and_fails_closed():
    from guardband.planner.step.refine import rescue_figure

    P = np.array([[0.5, 0.25], [1.0, np.nan], [0.0, 0.9]])
    out = rescue_figure(P)
    assert out[0] == pytest.approx(np.log(0.5 * 0.25), rel=1e-12)
    tiny = np.log(np.finfo(float).tiny)
    assert out[1] == pytest.approx(tiny) and out[2] == pytest.approx(tiny + np.log(0.9))
    # where the bound max(0, 1 - sum(1 - p)) is 0 for both, the product still tells them apart
    flat = np.array([[0.4, 0.4], [0.45, 0.45]])
    assert np.all(1 - np.sum(1 - flat, axis=1) <= 0)
    assert rescue_figure(flat)[1] > rescue_figure(flat)[0]


def test_rescue_search_moves_where_the_bound_is_flat_at_zero():
    # A simulated coating campaign (seed 8, threshold 0.5) whose starting design
    # holds no run that meets both limits. Searching on the screen's joint
    # figure (the bound, flat at 0 there) it stopped at its first step with
    # nothing proposed; the rescue search climbs the product of the limits'
    # probabilities and finds a run that passes the full screen.
    from guardband.planner.simulation.family import with_settings
    from guardband.planner.simulation.problems import get_problem
    from guardband.planner.simulation.runner import simulate

    problem = with_settings(get_problem("coating"), threshold=0.5, batch=1, pool=1000, refine=1)
    result = simulate(problem, None, budget=1, seeds=1, strategies=("protocol",), noise_scale=1.0,
                      workers=1, seed=8)
    h = result.histories["protocol"][0]
    assert not np.any(np.isfinite(h.best_safe[~h.planned]))  # no starting run met both limits
    assert not h.stalled and int(h.planned.sum()) == 1
    assert h.promised[h.planned][0] >= 0.5  # the screen's own bound, not the product


@pytest.mark.parametrize(("sd", "apart", "said"), [(0.0, 3.0, True), (0.5, 3.0, True), (1.0, 3.0, False),
                                                  (0.0, 0.0, False)])
def test_replicates_that_contradict_a_stated_measurement_sd_are_named(sd, apart, said):
    """A limit said to repeat within sd 0 (or 0.5) whose two runs at one setting differ by 3:
    the model's noise is fixed at the stated sd, so the plan and judge say which runs disagree.
    Two measurements differ by more than 4 sqrt(2) sd with probability 6e-5 (normal tail)."""
    data = unit_square_protocol({"name": "g", "upper": 10.0, "probability": 0.9, "measurement_sd": sd},
                                screen={"threshold": 0.9, "min_runs": 3}, batch={"size": 1, "pool": 100})
    protocol = parse_protocol(data)
    rng = np.random.default_rng(5)
    X = np.vstack([rng.random((7, 2)), [[0.3, 0.6]], [[0.3, 0.6]]])
    g = 2 * X[:, 0] + X[:, 1]
    g[-1] += apart
    runs = runs_table_from_arrays(protocol, X, {"y": X.sum(axis=1), "g": g})
    messages = plan_step(protocol, runs, seed=1, explain=False).messages
    found = [m for m in messages if "measurement_sd" in m]
    assert bool(found) == said, messages
    if said:
        assert runs.run_ids[-2] in found[0] and runs.run_ids[-1] in found[0]
        assert f"{apart:g} apart" in found[0] and f"measurement_sd = {sd:g}" in found[0]
