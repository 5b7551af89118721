"""Simulating protocols with binomial responses: counts drawn from the true rate, validation, reproducibility.

Reference: the binomial distribution itself (numpy's generator draws
Binomial(n, p); the mean of k / n is p with standard error
sqrt(p (1 - p) / (n N)) over N draws, the textbook variance of a
proportion). Breaks are judged on the true rate against the limit.
"""

from __future__ import annotations

import functools
from pathlib import Path

import numpy as np
import pytest

from guardband.planner.errors import ProtocolError
from guardband.planner.inputs.protocol import load_protocol, parse_protocol
from guardband.planner.simulation.loop import run_campaign, runs_table_from_arrays
from guardband.planner.simulation.scenarios import load_scenarios, parse_scenarios

from conftest import rate_protocol

ROOT = Path(__file__).resolve().parents[1]
DOSE = ROOT / "protocols" / "dose_combination.toml"
DOSE_SCENARIOS = ROOT / "protocols" / "scenarios" / "dose_combination_scenarios.toml"

RATE_PROTOCOL = rate_protocol(start={"rules": ["dose_a <= 10", "dose_b <= 1"]},
                              batch={"size": 1, "pool": 200, "refine": 0}, model={"restarts": 1})
RATE_TRUTH = {"response_rate": "logistic(-2 + 0.06 * dose_a + 0.5 * dose_b)",
              "dlt_rate": "logistic(-4 + 0.05 * dose_a + 0.4 * dose_b)"}


def _rate_protocol(**escalation):
    data = dict(RATE_PROTOCOL)
    if escalation:
        data["escalation"] = {**RATE_PROTOCOL["escalation"], **escalation}
    return parse_protocol(data, source="test.toml")


def _scenarios(truth=None, **extra):
    return {"scenario": [{"name": "s", "truth": dict(truth or RATE_TRUTH), **extra}]}


def test_drawn_rates_have_the_true_rate_as_mean_within_monte_carlo_error():
    problem = parse_scenarios(_scenarios(), _rate_protocol()).scenarios[0].problem
    assert problem.cohort == {"response_rate": 6, "dlt_rate": 6}  # the protocol's cohort size
    X = np.tile([[20.0, 2.0]], (20_000, 1))
    truth = problem.evaluate(X)
    got = problem.measure(truth, np.random.default_rng(11))
    for name in ("response_rate", "dlt_rate"):
        p = float(truth[name][0])
        k = got[name] * 6
        assert np.all(k == np.rint(k)) and k.min() >= 0 and k.max() <= 6  # whole counts out of 6
        se = np.sqrt(p * (1 - p) / (6 * X.shape[0]))
        assert abs(got[name].mean() - p) <= 4 * se, name  # 4 standard errors: fails about 1 time in 16,000
        assert got[name].var() == pytest.approx(p * (1 - p) / 6, rel=0.05)  # Binomial(6, p) / 6
    runs = runs_table_from_arrays(_rate_protocol(), X[:5], {r: v[:5] for r, v in got.items()},
                                  cohort=problem.cohort)
    events, subjects = runs.counts["response_rate"]
    assert np.array_equal(subjects, np.full(5, 6.0)) and np.allclose(events / 6, got["response_rate"][:5])


def test_a_seeded_simulation_reproduces_and_judges_breaks_on_the_true_rate():
    protocol = _rate_protocol()
    problem = parse_scenarios(_scenarios(), protocol).scenarios[0].problem
    run = functools.partial(run_campaign, protocol, problem.evaluate, n_start=4, budget=3, seed=5,
                            measure=problem.measure, pool_size=150, cohort=problem.cohort)
    a, b = run(), run()
    assert not a.stalled, a.message
    assert np.array_equal(a.X, b.X) and all(np.array_equal(a.Y[r], b.Y[r]) for r in a.Y)
    assert a.planned.sum() == 3
    assert np.array_equal(a.broke_limit, a.T["dlt_rate"] > 0.3)  # the true rate, not the count
    assert np.all((a.Y["response_rate"] * 6) == np.rint(a.Y["response_rate"] * 6))


def test_the_dose_example_scenarios_plan_rather_than_stall():
    # the bug: a simulated runs table carried no counts, so the binomial limit's model was never
    # fitted and every campaign stalled at its first step
    protocol = load_protocol(DOSE)
    sc = load_scenarios(DOSE_SCENARIOS, protocol).scenarios[0]
    h = run_campaign(protocol, sc.problem.evaluate, n_start=4, budget=2, seed=3, measure=sc.problem.measure,
                     pool_size=200, cohort=sc.problem.cohort)
    assert not h.stalled, h.message
    assert h.planned.sum() == 2


def test_a_binomial_response_without_a_cohort_is_refused():
    with pytest.raises(ValueError, match="'response_rate' is a binomial response: give its subjects"):
        runs_table_from_arrays(_rate_protocol(), np.zeros((1, 2)), {"response_rate": [0.5], "dlt_rate": [0.0]})


@pytest.mark.parametrize(("data", "message"), [
    (_scenarios({**RATE_TRUTH, "response_rate": "0.03 * dose_a"}),
     "scenario[0].truth.response_rate: 'response_rate' is a binomial response, so its formula is the true rate "
     "and must lie in [0, 1]; it ranges over [0, 1.2]"),
    # above 1 only at the corner (40, 4), a level combination a random sample may miss
    (_scenarios({**RATE_TRUTH, "dlt_rate": "0.1 + 0.9 * (dose_a / 40) * (dose_b / 4) ^ 3 + 0.01"}),
     "(at dose_a=40, dose_b=4 it is 1.01)"),
    (_scenarios(noise={"dlt_rate": 0.05}), "scenario[0].noise.dlt_rate: 'dlt_rate' is a binomial response"),
    (_scenarios(cohort={"dlt_rate": 0}), "scenario[0].cohort.dlt_rate: a cohort has at least 1 member"),
])
def test_scenario_refusals_name_the_field(data, message):
    with pytest.raises(ProtocolError) as err:
        parse_scenarios(data, _rate_protocol(), source="sc.toml")
    assert message in str(err.value)
    assert str(err.value).startswith("sc.toml: ")


def test_a_binomial_response_needs_a_cohort_size_somewhere():
    data = dict(RATE_PROTOCOL)
    data["escalation"] = {"no_skipping": True}
    protocol = parse_protocol(data)
    with pytest.raises(ProtocolError, match=r"scenario\[0\]\.cohort\.response_rate: .*give its subjects per run"):
        parse_scenarios(_scenarios(), protocol)
    problem = parse_scenarios(_scenarios(cohort={"response_rate": 3, "dlt_rate": 6}), protocol).scenarios[0].problem
    assert problem.cohort == {"response_rate": 3, "dlt_rate": 6}


def test_drawn_truths_are_refused_for_binomial_responses(tmp_path):
    with pytest.raises(ProtocolError, match=r"scenario\[0\]\.draw_from_runs: drawn truths are not available"):
        parse_scenarios({"scenario": [{"name": "d", "draw_from_runs": "runs.csv"}]}, _rate_protocol(),
                        folder=tmp_path)
