"""A binomial objective (a response rate given as counts): its rules, incumbent, refusals and steps.

References: every rule on the rate is checked against scipy.integrate.quad
over the latent Gaussian (adaptive quadrature, a reference library) and
against plain Monte Carlo of expit(f), f ~ N(mu, sd^2), with a tolerance of
five Monte Carlo standard errors; the probability and the bound against
scipy.stats.norm directly (expit is increasing, so the rate's probabilities
and quantiles are the latent's).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats
from scipy.special import expit, logit
from typer.testing import CliRunner

from guardband.planner.cli import app
from guardband.planner.errors import EXIT_RUNS, ProtocolError, RunsDataError
from guardband.planner.inputs.protocol import parse_protocol
from guardband.planner.inputs.runs import parse_runs_text
from guardband.planner.step import plan_step
from guardband.planner.step.acquisition import all_values, score
from guardband.planner.step.rates import (log_rate_expected_improvement, rate_bound, rate_expected_improvement,
                                          rate_moments, rate_probability_of_improvement)

from conftest import rate_protocol

PROTOCOL = rate_protocol(batch={"size": 2, "pool": 300, "refine": 0})
RUNS = ("run_id,dose_a,dose_b,responders,treated,dlt_events,dlt_subjects\n"
        "R1,0,0,0,6,0,6\nR2,5,0,1,6,0,6\nR3,0,1,1,6,0,6\nR4,5,1,2,6,0,6\nR5,10,1,3,6,1,6\n")

CASES = [(-1.0, 0.5, -0.5), (0.3, 1.2, 0.0), (-2.5, 0.2, -2.0), (1.5, 2.5, 0.8), (-4.0, 0.7, 1.0),
         (2.0, 0.05, 1.9)]


def _protocol(**objective):
    data = dict(PROTOCOL)
    data["objective"] = {**PROTOCOL["objective"], **objective}
    return parse_protocol(data, source="test.toml")


def _quad_ei(mu, sd, inc, maximize):
    r_star = expit(inc)
    gain = (lambda f: expit(f) - r_star) if maximize else (lambda f: r_star - expit(f))
    lo, hi = (inc, np.inf) if maximize else (-np.inf, inc)
    value, _ = integrate.quad(lambda f: gain(f) * stats.norm.pdf(f, mu, sd), lo, hi, epsabs=1e-14, epsrel=1e-12)
    return value


@pytest.mark.parametrize("maximize", [True, False])
@pytest.mark.parametrize("mu,sd,inc", CASES)
def test_expected_improvement_of_the_rate_matches_adaptive_quadrature(mu, sd, inc, maximize):
    got = rate_expected_improvement(np.array([mu]), np.array([sd]), inc, maximize=maximize)[0]
    want = _quad_ei(mu, sd, inc, maximize)
    assert got == pytest.approx(want, rel=1e-6, abs=1e-15)


@pytest.mark.parametrize("mu,sd,inc", CASES[:4])
def test_every_rule_of_the_rate_matches_monte_carlo(mu, sd, inc):
    rng = np.random.default_rng(7)
    r = expit(rng.normal(mu, sd, 400_000))
    r_star = expit(inc)
    v = all_values(np.array([mu]), np.array([sd]), inc, maximize=True, kappa=1.5, xi=0.02, scale="logit")
    gain = np.maximum(r - r_star, 0.0)
    se = lambda a: a.std() / np.sqrt(a.size)  # noqa: E731
    assert abs(v["ei"][0] - gain.mean()) <= 5 * se(gain) + 1e-12
    hit = (r > r_star + 0.02).astype(float)
    assert abs(v["pi"][0] - hit.mean()) <= 5 * se(hit) + 1e-12
    assert abs(v["mean"][0] - r.mean()) <= 5 * se(r)
    assert v["bound"][0] == pytest.approx(np.quantile(r, stats.norm.cdf(1.5)), abs=5e-3)


def test_probability_bound_and_moments_against_scipy():
    mu, sd = np.array([-1.2, 0.4, 2.0]), np.array([0.6, 1.5, 0.3])
    inc = -0.7
    pi = rate_probability_of_improvement(mu, sd, inc, xi=0.05, maximize=True)
    assert pi == pytest.approx(stats.norm.sf(logit(expit(inc) + 0.05), mu, sd), rel=1e-12)
    pi_min = rate_probability_of_improvement(mu, sd, inc, xi=0.05, maximize=False)
    assert pi_min == pytest.approx(stats.norm.cdf(logit(expit(inc) - 0.05), mu, sd), rel=1e-12)
    assert rate_bound(mu, sd, kappa=2.0, maximize=True) == pytest.approx(expit(mu + 2 * sd), rel=1e-14)
    assert rate_bound(mu, sd, kappa=2.0, maximize=False) == pytest.approx(expit(mu - 2 * sd), rel=1e-14)
    m, s = rate_moments(mu, sd)
    for k in range(3):
        ref_m = integrate.quad(lambda f: expit(f) * stats.norm.pdf(f, mu[k], sd[k]), -np.inf, np.inf)[0]
        ref_2 = integrate.quad(lambda f: expit(f) ** 2 * stats.norm.pdf(f, mu[k], sd[k]), -np.inf, np.inf)[0]
        assert m[k] == pytest.approx(ref_m, rel=1e-9)
        assert s[k] == pytest.approx(np.sqrt(ref_2 - ref_m**2), rel=1e-6)


def test_rules_stay_in_the_unit_interval_and_rank_far_tails():
    mu = np.linspace(-40, 40, 81)
    sd = np.full(81, 0.5)
    v = all_values(mu, sd, 0.0, maximize=True, kappa=2.0, xi=0.0, scale="logit")
    for name in ("ei", "pi", "bound", "mean"):
        assert np.all((v[name] >= 0) & (v[name] <= 1)), name
    assert np.all(v["ei"] <= 1 - expit(0.0) + 1e-15)
    # the log of EI stays finite and increasing where EI itself underflows, and no ties
    # where the mean rate rounds to 1
    log_ei = log_rate_expected_improvement(mu, sd, 0.0, maximize=True)
    assert np.all(np.isfinite(log_ei)) and np.all(np.diff(log_ei) >= 0)
    assert np.all(np.diff(log_ei[mu <= 10]) > 0) and log_ei[0] < -3000  # EI itself underflows there
    for rule in ("mean", "bound"):
        s = score(rule, mu, sd, 0.0, maximize=True, scale="logit")
        assert np.all(np.diff(s) > 0), rule
    s = score("pi", mu, sd, 0.0, maximize=True, scale="logit")  # as log Phi on the response scale:
    assert np.all(np.diff(s[mu <= 10]) > 0) and np.all(np.diff(s) >= 0)  # ties only where P rounds to 1
    # nothing improves on a rate of (almost) 1 by more than the margin
    assert rate_probability_of_improvement(mu, sd, 30.0, xi=0.01, maximize=True).max() == 0.0


def test_a_certain_rate_improves_by_its_own_gain():
    got = rate_expected_improvement(np.array([1.0, -1.0]), np.array([0.0, 0.0]), 0.0, maximize=True)
    assert got == pytest.approx([expit(1.0) - 0.5, 0.0], abs=1e-15)


def test_objective_schema_refusals_name_the_field():
    with pytest.raises(ProtocolError, match=r"objective: .*binomial objective 'response_rate' needs `events`"):
        _protocol(events=None)
    with pytest.raises(ProtocolError, match=r"objective: .*`measurement_sd` does not apply"):
        _protocol(measurement_sd=0.1)
    with pytest.raises(ProtocolError, match=r"objective: .*belong to a kind = \"binomial\" objective"):
        _protocol(kind="continuous")
    with pytest.raises(ProtocolError, match=r"'dlt_events' is used twice: as the events column of the objective"):
        _protocol(events="dlt_events")


def test_a_count_column_named_by_two_responses_is_refused_saying_which_and_what_to_do():
    """Responders and toxicities counted among the same cohort: one `subjects` column for both
    was refused as 'used for a factor and a response', though no factor was involved."""
    with pytest.raises(ProtocolError) as err:
        _protocol(subjects="dlt_subjects")
    text = str(err.value)
    assert "used for a factor" not in text
    assert ("name 'dlt_subjects' is used twice: as the subjects column of the objective 'response_rate' "
            "and as the subjects column of the limit 'dlt_rate'") in text
    assert "each binomial response needs its own two count columns" in text
    # a clash with a factor keeps its own words, naming the response's column
    with pytest.raises(ProtocolError, match=r"name 'dose_a' is used for a factor and a response \(the events "
                                            r"column of the objective 'response_rate'\)"):
        _protocol(events="dose_a")


def test_a_continuous_objective_keeps_its_fingerprint_keys():
    data = dict(PROTOCOL)
    data["objective"] = {"name": "score", "direction": "maximize"}
    canonical = parse_protocol(data).canonical().decode()
    assert '"objective":{"direction":"maximize","measurement_sd":null,"name":"score","unit":""}' in canonical


def test_runs_give_counts_and_a_rate_alone_is_refused():
    p = _protocol()
    runs = parse_runs_text(RUNS, p)
    assert runs.Y["response_rate"] == pytest.approx([0, 1 / 6, 1 / 6, 2 / 6, 3 / 6])
    assert runs.counts["response_rate"][1].tolist() == [6.0] * 5
    with pytest.raises(RunsDataError) as err:
        parse_runs_text("run_id,dose_a,dose_b,response_rate,dlt_events,dlt_subjects\nR1,0,0,0.5,0,6\n", p)
    msg = str(err.value)
    assert "'response_rate' is a binomial response and a rate alone cannot be used" in msg
    assert "'responders'" in msg and "'treated'" in msg
    with pytest.raises(RunsDataError, match=r"row 2 \(run R1\), columns responders/treated: the number of events"):
        parse_runs_text(RUNS.replace("R1,0,0,0,6", "R1,0,0,7,6"), p)


def test_cli_refuses_a_rate_alone_with_exit_code_4(tmp_path):
    proto = tmp_path / "p.toml"
    _write_protocol(proto)
    runs = tmp_path / "runs.csv"
    runs.write_text("run_id,dose_a,dose_b,response_rate,dlt_events,dlt_subjects\nR1,0,0,0.5,0,6\n")
    res = CliRunner().invoke(app, ["plan", str(proto), str(runs), "--out", str(tmp_path / "o"), "--by", "t"])
    assert res.exit_code == EXIT_RUNS == 4
    assert "give the number of events in column 'responders'" in res.stderr
    assert not (tmp_path / "o").exists()


PROTOCOL_TOML = """
[study]
title = "response rate (test)"
version = "1"
author = "test"
kind = "dose"

[[factors]]
name = "dose_a"
kind = "discrete"
levels = [0, 5, 10, 20, 40]

[[factors]]
name = "dose_b"
kind = "discrete"
levels = [0, 1, 2, 4]

[objective]
name = "response_rate"
direction = "maximize"
kind = "binomial"
events = "responders"
subjects = "treated"

[[limits]]
name = "dlt_rate"
kind = "binomial"
events = "dlt_events"
subjects = "dlt_subjects"
upper = 0.3
probability = 0.8

[screen]
threshold = 0.8
min_runs = 3
max_step = 0.3

[escalation]
no_skipping = true
cohort_size = 6

[ranking]
rule = "ei"

[batch]
size = 2
pool = 300
refine = 0
"""


def _write_protocol(path):
    path.write_text(PROTOCOL_TOML, encoding="utf-8")
    assert parse_protocol(__import__("tomllib").loads(PROTOCOL_TOML)) == _protocol()


def test_incumbent_is_the_best_observed_rate_ties_to_more_subjects():
    p = _protocol()
    text = RUNS + "R6,0,2,6,12,0,6\n"  # 6 of 12 ties R5's 3 of 6 and had more subjects
    result = plan_step(p, parse_runs_text(text, p), seed=1, pool_size=200)
    inc = result.incumbent
    assert inc["run_id"] == "R6" and inc["value"] == 0.5 and (inc["events"], inc["subjects"]) == (6, 12)
    model = result.fitted["response_rate"]
    assert inc["latent"] == pytest.approx(float(model.predict(model.X[-1:])[0][0]))
    assert 0 < inc["model_rate"] < 1


def test_one_responder_of_one_is_the_incumbent_but_not_a_ceiling():
    p = _protocol()
    text = RUNS + "R6,0,2,1,1,0,6\n"
    result = plan_step(p, parse_runs_text(text, p), seed=1, pool_size=200)
    assert result.incumbent["run_id"] == "R6" and result.incumbent["value"] == 1.0
    assert result.incumbent["model_rate"] < 0.8  # a single subject weighs what one subject weighs
    assert result.proposals and all(q.values["ei"] > 0 for q in result.proposals)


def test_a_planning_step_shows_every_rate_inside_the_unit_interval():
    p = _protocol()
    result = plan_step(p, parse_runs_text(RUNS, p), seed=4, pool_size=300)
    assert result.mode == "improve" and result.proposals
    for q in result.proposals:
        assert 0 <= q.lo95 <= q.mean <= q.hi95 <= 1
        assert 0 < q.sd < 0.5
        assert all(0 <= q.values[k] <= 1 for k in ("ei", "pi", "bound", "mean"))
    # the plan's EI is the rate's, against the model's rate at the incumbent
    first = result.proposals[0]
    model = result.fitted["response_rate"]
    mu, sd = model.predict(result.unit(first.x[None, :]))
    assert first.values["ei"] == pytest.approx(_quad_ei(mu[0], sd[0], result.incumbent["latent"], True), rel=1e-6)
    assert first.mean == pytest.approx(rate_moments(mu, sd)[0][0], rel=1e-12)
    for e in result.rule_picks:
        if e["candidate"] is not None:
            o = e["outcome"]
            assert 0 <= o["lo95"] <= o["mean"] <= o["hi95"] <= 1
    assert all(e["best_mean"] is None or 0 <= e["best_mean"] <= 1 for e in result.threshold_price)


def test_a_batch_of_rates_values_its_later_picks_over_sampled_results():
    # the sampled method draws the earlier picks' latent results and values later picks by the
    # rate's rule under each draw: a rate, so every value stays a probability gain in [0, 1]
    p = _with_batch(method="sampled")
    assert p.batch.size == 2
    result = plan_step(p, parse_runs_text(RUNS, p), seed=4, pool_size=300)
    assert len(result.proposals) == 2
    second = result.proposals[1]
    assert "averaged over 128 sampled results of 1 earlier pick(s)" in second.reason
    assert all(0 <= second.given_earlier[k] <= 1 for k in ("ei", "pi", "bound", "mean"))


def test_a_batch_of_rates_explores_on_the_latent_scale():
    # the explore method's later pick takes the largest latent sd among the candidates whose bounds
    # (on the logit, a monotone map of the rate's) could still make them the best; its values stay rates
    p = _with_batch(method="explore")
    result = plan_step(p, parse_runs_text(RUNS, p), seed=4, pool_size=300)
    assert len(result.proposals) == 2
    second = result.proposals[1]
    assert "the largest objective sd" in second.reason and "could still be the best" in second.reason
    assert all(0 <= second.given_earlier[k] <= 1 for k in ("ei", "pi", "bound", "mean"))
    assert second.joint >= p.screen.threshold


def _with_batch(**batch):
    data = dict(PROTOCOL)
    data["batch"] = {**PROTOCOL.get("batch", {}), **batch}
    return parse_protocol(data, source="test.toml")


def test_slices_and_model_checks_of_the_rate_stay_in_the_unit_interval():
    from guardband.planner.models.checks import loo_interval
    from guardband.planner.report.data import map_data, slice_data

    p = _protocol()
    result = plan_step(p, parse_runs_text(RUNS, p), seed=4, pool_size=300)
    x0 = result.proposals[0].x
    for factor in ("dose_a", "dose_b"):
        centre, lo, hi = slice_data(result, x0, factor).band("response_rate")
        assert np.all((lo >= 0) & (lo <= centre) & (centre <= hi) & (hi <= 1))
    md = map_data(result, x0, ("dose_a", "dose_b"))
    assert np.all((md.objective[md.inside] >= 0) & (md.objective[md.inside] <= 1))
    lo, hi, _ = loo_interval(result.fitted["response_rate"])
    assert np.all((lo >= 0) & (hi <= 1))


def test_cli_plans_a_response_rate_and_judges_a_recipe(tmp_path):
    proto, runs = tmp_path / "p.toml", tmp_path / "runs.csv"
    _write_protocol(proto)
    runs.write_text(RUNS)
    res = CliRunner().invoke(app, ["plan", str(proto), str(runs), "--out", str(tmp_path / "o"), "--by", "t",
                                   "--seed", "3", "-f", "json"])
    assert res.exit_code == 0, res.output
    import json

    data = json.loads(res.stdout)
    assert data["incumbent"]["run_id"] == "R5" and data["incumbent"]["value"] == 0.5
    for q in data["proposals"]:
        o = q["objective"]
        assert 0 <= o["lo95"] <= o["mean"] <= o["hi95"] <= 1
    recipes = tmp_path / "recipes.csv"
    recipes.write_text("run_id,dose_a,dose_b\nA,5,2\n")
    res = CliRunner().invoke(app, ["judge", str(proto), str(runs), str(recipes), "--out", str(tmp_path / "j"),
                                   "--by", "t", "--seed", "3", "-f", "json"])
    assert res.exit_code == 0, res.output
    verdict = json.loads(res.stdout)["verdicts"][0]["objective"]
    assert 0 <= verdict["lo95"] <= verdict["mean"] <= verdict["hi95"] <= 1


def test_the_dose_example_plan_shows_the_dlt_rate_with_its_interval_inside_the_unit_interval():
    from pathlib import Path

    from guardband.planner.app.plan_text import figures_table
    from guardband.planner.app.workflow import plan_table
    from guardband.planner.inputs.protocol import load_protocol
    from guardband.planner.inputs.runs import read_runs
    from guardband.planner.models.binomial import rate_band

    root = Path(__file__).resolve().parents[1] / "protocols"
    p = load_protocol(root / "dose_combination.toml")
    result = plan_step(p, read_runs(root / "dose_combination_runs.csv", p), seed=2, pool_size=300)
    header, rows = plan_table(result, step_label="P1")
    at = {h: header.index(h) for h in ("dlt_rate_median", "dlt_rate_lo95", "dlt_rate_hi95")}
    model = result.fitted["dlt_rate"]
    for q, row in zip(result.proposals, rows):
        median, lo, hi = (row[at[h]] for h in ("dlt_rate_median", "dlt_rate_lo95", "dlt_rate_hi95"))
        assert 0 <= lo <= median <= hi <= 1
        want = rate_band(*model.predict(result.unit(q.x[None, :])))
        assert (median, lo, hi) == pytest.approx([float(w[0]) for w in want], rel=1e-12)
    assert "dlt_rate (95% interval)" in figures_table(result, "P1")


def test_cli_table_says_the_rule_figures_are_of_the_true_rate(tmp_path):
    proto, runs = tmp_path / "p.toml", tmp_path / "runs.csv"
    _write_protocol(proto)
    runs.write_text(RUNS)
    res = CliRunner().invoke(app, ["plan", str(proto), str(runs), "--out", str(tmp_path / "o"), "--by", "t",
                                   "--seed", "3"])
    assert res.exit_code == 0, res.output
    assert "figures for its true rate" in res.stdout and "next measured result" not in res.stdout
    assert "the rules compare with the model's rate there" in " ".join(res.stdout.split())
    assert "CAUTIONS:" in res.stdout and "not for dosing patients" in res.stdout
