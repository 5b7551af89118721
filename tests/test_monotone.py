"""Monotone toxicity (Hypothesis): a point is never judged safer than any point or run at lower or equal doses.

Common practice in dose finding (trade practice: toxicity does not fall as a
dose rises; the 3+3 design and the continual reassessment method both
assume it). The screen takes, for a monotone binomial limit, the least
probability over the dominated set, and excludes a point at or above a
cohort that broke the limit with its own reason.
"""

from __future__ import annotations

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from guardband.planner.inputs.protocol import parse_protocol
from guardband.planner.models.binomial import BinomialHyperparameters, fit_binomial_gp
from guardband.safety.limits import ScreenRules
from guardband.safety.screen import DOMINANCE_TOL, limit_predictions, limit_probability, probabilities_at, run_screen

CASES = settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
LEVELS_A = [0.0, 5.0, 10.0, 20.0, 40.0]
LEVELS_B = [0.0, 1.0, 2.0, 4.0]


def _protocol(discrete: bool):
    if discrete:
        factors = [{"name": "a", "kind": "discrete", "levels": LEVELS_A},
                   {"name": "b", "kind": "discrete", "levels": LEVELS_B}]
    else:
        factors = [{"name": "a", "kind": "continuous", "lower": 0, "upper": 40},
                   {"name": "b", "kind": "continuous", "lower": 0, "upper": 4}]
    return parse_protocol({
        "study": {"title": "t", "version": "1", "author": "x", "kind": "dose"},
        "factors": factors,
        "objective": {"name": "r", "direction": "maximize"},
        "limits": [{"name": "tox", "kind": "binomial", "events": "e", "subjects": "n", "upper": 0.25,
                    "probability": 0.9}],
        "screen": {"threshold": 0.9, "min_runs": 1},
    })


@st.composite
def cases(draw):
    discrete = draw(st.booleans())
    n_runs = draw(st.integers(1, 6))
    if discrete:
        pick = st.tuples(st.sampled_from(LEVELS_A), st.sampled_from(LEVELS_B))
    else:
        pick = st.tuples(st.floats(0, 40), st.floats(0, 4))
    runs = np.array(draw(st.lists(pick, min_size=n_runs, max_size=n_runs)), dtype=float)
    subjects = np.array(draw(st.lists(st.integers(1, 9), min_size=n_runs, max_size=n_runs)), dtype=float)
    events = np.array([draw(st.integers(0, int(n))) for n in subjects], dtype=float)
    points = np.array(draw(st.lists(pick, min_size=1, max_size=25)), dtype=float)
    hp = BinomialHyperparameters(np.array([draw(st.floats(0.05, 2.0)), draw(st.floats(0.05, 2.0))]),
                                 draw(st.floats(0.2, 16.0)))
    return discrete, runs, events, subjects, points, hp


def _judge(protocol, model, X):
    rules = ScreenRules.from_protocol(protocol)
    preds = limit_predictions(rules.limits, [model], protocol.design_space().to_unit(X))
    return rules, preds, probabilities_at(preds, X.shape[0])[0][:, 0]


@CASES
@given(cases())
def test_no_point_is_judged_safer_than_the_doses_below_it(case):
    discrete, runs, events, subjects, X, hp = case
    p = _protocol(discrete)
    space = p.design_space()
    rules = ScreenRules.from_protocol(p)
    assert rules.limits[0].monotone  # on by default: a binomial upper limit in a dose study
    model = fit_binomial_gp(space.to_unit(runs), events, subjects, prior_mean=rules.limits[0].prior_mean,
                            hyperparameters=hp)
    rules, preds, P = _judge(p, model, X)
    # "at or below" in the unit-scaled coordinates the screen uses, with its slack
    U, U_runs = space.to_unit(X), space.to_unit(runs)
    below = np.all(U[None, :, :] <= U[:, None, :] + DOMINANCE_TOL, axis=2)  # below[i, j]: j at or below i
    for i in range(len(X)):
        assert np.all(P[i] <= P[below[i]] + 1e-12)
    # and never above a run at or below it (the run's own probability, from the same model)
    run_p = limit_probability(*model.predict(U_runs), upper=0.25, scale="logit")
    run_below = np.all(U_runs[None, :, :] <= U[:, None, :] + DOMINANCE_TOL, axis=2)
    for i in range(len(X)):
        assert np.all(P[i] <= run_p[run_below[i]] + 1e-12)
    # a point at or above a dose that broke the limit (all its subjects pooled) is excluded for that
    # reason, with probability 0
    same = np.all(runs[:, None, :] == runs[None, :, :], axis=2)
    broke = (same @ events) / (same @ subjects) > 0.25
    above = np.any(run_below & broke[None, :], axis=1)
    assert np.all(P[above] == 0.0)
    res = run_screen(inside=np.ones(len(X), dtype=bool), limits=preds, threshold=0.9)
    assert np.all(res.reason[above] == "above-broken-cohort")
    assert not np.any(res.reason[~above] == "above-broken-cohort")
    if discrete:  # every point is on the lattice: its figure does not depend on the others judged with it
        for i in range(len(X)):
            assert abs(_judge(p, model, X[i : i + 1])[2][0] - P[i]) <= 1e-12  # round-off of the matrix products


def test_monotone_switch_off_leaves_the_model_probability():
    p = _protocol(True)
    data = p.model_dump(mode="python")
    data["limits"][0]["monotone"] = False
    off = parse_protocol(data)
    space = off.design_space()
    runs = np.array([[10.0, 1.0]])
    model = fit_binomial_gp(space.to_unit(runs), [0], [6], prior_mean=np.log(1 / 3),
                            hyperparameters=BinomialHyperparameters(np.array([0.3, 0.3]), 4.0))
    X = np.array([[0.0, 0.0], [10.0, 1.0], [20.0, 2.0]])
    _, _, P = _judge(off, model, X)
    raw = limit_probability(*model.predict(space.to_unit(X)), upper=0.25, scale="logit")
    np.testing.assert_array_equal(P, raw)
    # with the switch on, (10, 1) is held to the less certain (0, 0) below it
    _, _, P_on = _judge(p, model, X)
    assert P_on[1] == P_on[0] < raw[1]
