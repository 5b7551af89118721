"""The textbook constrained rule, run by the simulator beside Guardband.

Expected improvement times the probability of meeting every limit, each
limit judged by its own Gaussian-process model, no screen: the constrained
expected improvement of Schonlau, Welch & Jones (1998, "Global versus local
search in constrained optimization of computer models") and Gardner et al.
(2014, ICML, "Bayesian optimization with inequality constraints"), both
from memory. EI is checked against its closed form (Jones, Schonlau &
Welch 1998), the probability of an upper limit against the normal CDF
(``scipy.stats.norm``).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import norm

from guardband.planner.inputs.protocol import parse_protocol
from guardband.planner.simulation import PROBLEMS, run_campaign, runs_table_from_arrays, simulate
from guardband.planner.simulation.problems import gramacy_protocol_dict
from guardband.planner.simulation.strategies import (DEFAULT_STRATEGIES, NO_CAP, SCREEN_OFF, STRATEGIES,
                                                     step_options, strategy_protocol)
from guardband.planner.step import plan_step
from guardband.planner.step.acquisition import weighted_by_joint
from guardband.planner.step.result import Scaler
from guardband.safety.limits import ScreenRules

FAST = {"batch": {"size": 1, "pool": 300, "refine": 0}, "model": {"restarts": 1}}


def _textbook_gramacy():
    base = parse_protocol({**gramacy_protocol_dict(batch=1, rule="ei", threshold=0.9), **FAST})
    return strategy_protocol(base, "textbook")


def _runs(protocol, n=12, seed=3):
    problem = PROBLEMS["gramacy"]
    X = protocol.design_space().sample(n, rng=np.random.default_rng(seed))
    return runs_table_from_arrays(protocol, X, problem.evaluate(X))


def test_weighted_by_joint_is_the_log_of_ei_times_the_probability():
    mu, sd, inc = np.array([0.2, 0.5, 1.0]), np.array([0.3, 0.1, 0.4]), 0.4
    u = inc - mu  # minimising
    ei = u * norm.cdf(u / sd) + sd * norm.pdf(u / sd)  # Jones, Schonlau & Welch (1998)
    joint = np.array([0.9, 0.3, 0.05])
    got = weighted_by_joint(np.log(ei), joint)
    np.testing.assert_allclose(np.exp(got), ei * joint, rtol=1e-12)


def test_a_candidate_that_cannot_meet_the_limits_ranks_last_not_nan():
    got = weighted_by_joint(np.array([-1.0, -1.0, -1.0]), np.array([0.0, 1e-300, 0.5]))
    assert np.all(np.isfinite(got)) and got[0] < got[1] < got[2]


def test_textbook_protocol_has_no_screen_no_guards_no_step_rules():
    dose = PROBLEMS["dose"].protocol
    tb = strategy_protocol(dose, "textbook")
    assert tb.screen.threshold == SCREEN_OFF and tb.screen.joint == "independent"
    assert all(lim.probability == SCREEN_OFF for lim in tb.limits)
    assert not (tb.screen.short_model or tb.screen.widen_from_loo or tb.screen.widen_locally
                or tb.screen.single_run_check)
    assert tb.screen.max_step is None and tb.screen.span_reach is None
    assert tb.model.limit_length_scale_max == NO_CAP and tb.ranking.rule == "ei"
    assert tb.screen.forbidden == dose.screen.forbidden and tb.limits[0].upper == dose.limits[0].upper
    assert step_options("textbook") == {"textbook": True}
    assert step_options("screen-off") == {} and step_options("protocol") == {}
    assert "textbook" in STRATEGIES and "textbook" not in DEFAULT_STRATEGIES


def test_textbook_step_picks_the_largest_ei_times_probability_of_its_pool():
    protocol = _textbook_gramacy()
    runs = _runs(protocol)
    res = plan_step(protocol, runs, seed=11, explain=False, textbook=True)
    assert res.mode == "improve" and len(res.proposals) == 1
    inc = res.incumbent["value"]
    # the score the step ranked by is log EI + log(product of the limits' probabilities)
    mean, sd = res.proposals[0].mean, res.proposals[0].sd
    u = inc - mean
    expected = np.log(u * norm.cdf(u / sd) + sd * norm.pdf(u / sd)) + np.log(res.proposals[0].joint)
    assert res.proposals[0].score == pytest.approx(expected, rel=1e-9, abs=1e-9)
    assert res.proposals[0].joint == pytest.approx(np.prod(list(res.proposals[0].p.values())), rel=1e-12)
    survivors = res.screen.survives
    assert res.proposals[0].score == pytest.approx(np.max(res.scores[survivors]), rel=0, abs=1e-12)


def test_textbook_limit_models_centre_on_the_data_not_the_limit():
    protocol = _textbook_gramacy()
    runs = _runs(protocol)
    tb = plan_step(protocol, runs, seed=11, explain=False, textbook=True)
    ours = plan_step(protocol, runs, seed=11, explain=False)
    for lim in protocol.limits:
        y = runs.Y[lim.name]
        assert tb.fitted[lim.name].prior_mean == pytest.approx(float(np.mean(y)), rel=1e-12)
        assert ours.fitted[lim.name].prior_mean == pytest.approx(lim.upper, rel=1e-12)


def test_upper_limit_probability_is_the_normal_cdf_of_the_margin():
    protocol = _textbook_gramacy()
    runs = _runs(protocol)
    res = plan_step(protocol, runs, seed=11, explain=False, textbook=True)
    p = res.proposals[0]
    for lim, rule in zip(protocol.limits, ScreenRules.from_protocol(protocol).limits):
        model = res.fitted[lim.name]
        # judged on the next measurement: the predictive sd includes the noise
        m, s = model.predict(Scaler(res.space).unit(p.x), include_noise=rule.with_noise)
        assert p.p[lim.name] == pytest.approx(float(norm.cdf((lim.upper - m[0]) / s[0])), rel=1e-9, abs=1e-12)


def test_simulator_runs_textbook_apart_from_screen_off_even_with_equal_protocols():
    base = parse_protocol({**gramacy_protocol_dict(batch=1, rule="ei", threshold=0.9), **FAST,
                           "screen": {"threshold": 0.9, "short_model": False, "widen_from_loo": False,
                                      "widen_locally": False, "single_run_check": False}})
    out = simulate("gramacy", base, budget=2, seeds=1, n_start=8, strategies=("screen-off", "textbook"),
                   workers=1, pool_size=200)
    assert "textbook" not in out.same_as and "screen-off" not in out.same_as


def test_textbook_breaks_more_than_guardband_on_the_same_starts():
    """Safety is what the screen buys: same seeds, same starting runs, noise-free."""
    settings = parse_protocol({**gramacy_protocol_dict(batch=1, rule="ei", threshold=0.9), **FAST})
    out = simulate("gramacy", settings, budget=6, seeds=2, n_start=8,
                   strategies=("protocol", "textbook"), workers=1, pool_size=300)
    broke = {st: sum(int(h.broke_limit[h.planned].sum()) for h in out.histories[st]) for st in out.strategies}
    starts = [h.X[~h.planned] for h in out.histories["protocol"]]
    assert all(np.array_equal(a, h.X[~h.planned]) for a, h in zip(starts, out.histories["textbook"]))
    assert broke["textbook"] > broke["protocol"]


def test_run_campaign_passes_the_step_options():
    protocol = _textbook_gramacy()
    problem = PROBLEMS["gramacy"]
    h = run_campaign(protocol, problem.evaluate, n_start=8, budget=2, seed=4,
                     step_kw=step_options("textbook"))
    assert int(h.planned.sum()) == 2 and not h.stalled
