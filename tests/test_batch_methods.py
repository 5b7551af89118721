"""How a batch values its later picks (batch.method) and when it stops early (batch.least_worth)."""

import copy
import json
import re

import numpy as np
import pytest
from scipy import integrate
from scipy.stats import norm

from guardband.planner.errors import ProtocolError
from guardband.planner.inputs.protocol import parse_protocol
from guardband.planner.simulation.problems import get_problem
from guardband.planner.step import plan_step
from guardband.planner.step.acquisition import expected_improvement
from guardband.planner.step.batch import SAMPLES

from conftest import gramacy_batch_protocol, gramacy_batch_runs

from test_protocol import BASE

SEED = 11


def _protocol(**batch):
    return gramacy_batch_protocol(**batch)


@pytest.fixture(scope="module")
def gramacy_runs():
    return get_problem("gramacy"), gramacy_batch_runs()


@pytest.fixture(scope="module")
def sampled_plan(gramacy_runs):
    _, runs = gramacy_runs
    p = _protocol(method="sampled")
    return p, plan_step(p, runs, seed=SEED, explain=False)


def test_the_sampled_second_pick_is_worth_the_mean_ei_over_the_first_picks_results(sampled_plan):
    # Reference: the multi-point expected improvement's greedy increment
    # (Ginsbourger, Le Riche & Carraro 2010, from memory): EI at the second
    # pick averaged over the first pick's result drawn from its predictive
    # distribution, the incumbent in each draw being the better of the
    # incumbent and the model's mean at the first pick once conditioned on
    # that draw. Integrated here with scipy's adaptive quadrature over
    # GaussianProcess.condition (Rasmussen & Williams 2006, eqs. 2.23-2.24),
    # not over the rank-one updates the planner uses; the planner's 128
    # quasi-random draws agree within 10%.
    p, result = sampled_plan
    assert result.mode == "improve" and len(result.proposals) >= 2, result.messages
    first, second = result.proposals[:2]
    gp = result.fitted[p.objective.name]
    u1, u2 = result.unit(first.x[None, :]), result.unit(second.x[None, :])
    m1, s1 = gp.predict(u1, include_noise=True)
    inc = result.incumbent["value"]

    def ei_given(e):
        cond = gp.condition(u1, np.array([m1[0] + s1[0] * e]))
        mu, sd = cond.predict(np.vstack([u1, u2]))
        best = max(inc, mu[0]) if p.maximize else min(inc, mu[0])
        return expected_improvement(mu[1:], sd[1:], best, maximize=p.maximize)[0] * norm.pdf(e)

    reference, _ = integrate.quad(ei_given, -8.0, 8.0, limit=200)
    assert reference > 1e-4 * first.given_earlier["ei"]  # a value worth comparing
    assert second.given_earlier["ei"] == pytest.approx(reference, rel=0.10)
    assert f"averaged over {SAMPLES} sampled results of 1 earlier pick(s)" in second.reason


def test_the_sampled_method_keeps_the_mean_and_bound_of_the_believer(sampled_plan):
    p, result = sampled_plan
    first, second = result.proposals[:2]
    gp = result.fitted[p.objective.name]
    cond = gp.condition(result.unit(first.x[None, :]), np.array([first.mean]))
    mu, sd = cond.predict(result.unit(second.x[None, :]))
    sign = 1.0 if p.maximize else -1.0
    assert second.given_earlier["mean"] == pytest.approx(float(mu[0]), rel=1e-9)
    assert second.given_earlier["bound"] == pytest.approx(float(mu[0] + sign * p.ranking.kappa * sd[0]), rel=1e-9)


def test_every_sampled_pick_passes_the_screen_on_the_real_models(sampled_plan):
    p, result = sampled_plan
    for prop in result.proposals:
        assert prop.joint >= p.screen.threshold
        assert all(prop.p[lim.name] >= lim.probability for lim in p.limits)


def test_the_sampled_plan_is_a_function_of_its_inputs(gramacy_runs, sampled_plan):
    p, result = sampled_plan
    again = plan_step(p, gramacy_runs[1], seed=SEED, explain=False)
    assert again.proposal_dicts() == result.proposal_dicts()


# ---------------------------------------------------------------- least worth
def _shares(result) -> list[float]:
    e = [prop.given_earlier["ei"] for prop in result.proposals]
    return [v / e[0] for v in e]


@pytest.mark.parametrize("method", ["sampled", "believer"])
def test_the_batch_stops_at_the_first_pick_worth_too_little(gramacy_runs, method):
    _, runs = gramacy_runs
    full = plan_step(_protocol(method=method), runs, seed=SEED, explain=False)
    shares = _shares(full)
    assert len(shares) == 4, full.messages
    k = int(np.argmin(shares[1:])) + 1  # the least worthwhile later pick
    least = shares[k] * 1.001 if shares[k] * 1.001 < 1 else 0.999
    stop_at = next(i for i in range(1, 4) if shares[i] < least)
    short = plan_step(_protocol(method=method, least_worth=least), runs, seed=SEED, explain=False)
    assert len(short.proposals) == stop_at
    assert [q.x.tolist() for q in short.proposals] == [q.x.tolist() for q in full.proposals[:stop_at]]
    value, first = full.proposals[stop_at].given_earlier["ei"], full.proposals[0].given_earlier["ei"]
    text = next(m for m in short.messages if m.startswith("the batch stopped"))
    assert text.startswith(f"the batch stopped at {stop_at} of 4 runs: pick {stop_at + 1} would be worth "
                           f"ei {value:.3g} ")
    assert f"of the first pick's {first:.3g}, below batch.least_worth {least:g}" in text


def test_a_batch_size_asked_for_is_filled(gramacy_runs):
    _, runs = gramacy_runs
    p = _protocol(least_worth=0.999)
    assert len(plan_step(p, runs, seed=SEED, explain=False).proposals) == 1
    forced = plan_step(p, runs, seed=SEED, explain=False, count=4)
    assert len(forced.proposals) == 4
    assert not any("batch stopped" in m or "least_worth" in m for m in forced.messages)


def test_least_worth_says_when_it_does_not_apply(gramacy_runs):
    _, runs = gramacy_runs
    data = _protocol(least_worth=0.5).model_dump(mode="python")
    data["ranking"]["rule"] = "bound"
    result = plan_step(parse_protocol(data, source="bound"), runs, seed=SEED, explain=False)
    assert len(result.proposals) == 4
    assert "batch.least_worth 0.5 was not applied: the bound rule has no value that falls to nothing " \
           "(only ei and pi do)" in result.messages


@pytest.mark.parametrize("key, value, message", [
    ("least_worth", 1.0, "protocol: batch.least_worth: Input should be less than 1"),
    ("least_worth", -0.1, "protocol: batch.least_worth: Input should be greater than or equal to 0"),
    ("method", "greedy", "protocol: batch.method: Input should be 'sampled', 'believer' or 'explore'"),
])
def test_bad_batch_settings_name_the_field(key, value, message):
    with pytest.raises(ProtocolError, match=re.escape(message)):
        parse_protocol({**copy.deepcopy(BASE), "batch": {key: value}})


# ---------------------------------------------------------------- search per run
@pytest.mark.parametrize("per_run, drawn, refined", [(True, 1800, 6), (False, 600, 2)])
def test_the_search_grows_with_the_runs_asked_for(gramacy_runs, per_run, drawn, refined):
    _, runs = gramacy_runs
    p = _protocol(search_per_run=per_run, refine=2)
    result = plan_step(p, runs, seed=SEED, explain=False, count=3)
    origin = list(result.origin)
    assert origin.count("pool") + origin.count("local") == drawn  # gramacy: continuous, no duplicates
    assert 0 < origin.count("refined") <= refined
    said = [m for m in result.messages if "batch.search_per_run" in m]
    assert said == ([f"the search drew 1800 candidates and refined up to 6 survivors: 600 and 2 for each of "
                     "the 3 runs asked for (batch.search_per_run)"] if per_run else [])


def test_the_search_grows_only_within_its_budget(gramacy_runs, monkeypatch):
    import guardband.planner.step.plan as plan_mod

    _, runs = gramacy_runs
    n = int((~runs.pending).sum())
    p = _protocol(search_per_run=True, refine=2)
    # room for twice the pool, not three times: the search doubles and says so
    monkeypatch.setattr(plan_mod, "SEARCH_BUDGET", 600 * n * 2 + 1)
    result = plan_step(p, runs, seed=SEED, explain=False, count=3)
    origin = list(result.origin)
    assert origin.count("pool") + origin.count("local") == 1200
    assert [m for m in result.messages if "batch.search_per_run" in m] == [
        "the search drew 1200 candidates and refined up to 4 survivors: 600 and 2 2 times over for the 3 runs "
        "(batch.search_per_run)"]
    # no room for a second search: one search for the whole batch, and the plan says why
    monkeypatch.setattr(plan_mod, "SEARCH_BUDGET", 600 * n * 2 - 1)
    result = plan_step(p, runs, seed=SEED, explain=False, count=3)
    origin = list(result.origin)
    assert origin.count("pool") + origin.count("local") == 600
    said = [m for m in result.messages if "batch.search_per_run" in m]
    assert len(said) == 1 and said[0].startswith("the search drew 600 candidates for the whole batch")


def test_one_run_searches_alike_either_way(gramacy_runs):
    _, runs = gramacy_runs
    a = plan_step(_protocol(search_per_run=True), runs, seed=SEED, explain=False, count=1)
    b = plan_step(_protocol(search_per_run=False), runs, seed=SEED, explain=False, count=1)
    assert a.pool.tobytes() == b.pool.tobytes()
    assert a.proposals[0].x.tolist() == b.proposals[0].x.tolist()


def test_the_plan_and_its_log_say_why_the_batch_stopped(tmp_path):
    from typer.testing import CliRunner

    from guardband.planner.cli import app
    from conftest import PROTOCOLS

    text = (PROTOCOLS / "tablet_blend.toml").read_text(encoding="utf-8")
    assert "[batch]\nsize = 4\n" in text
    protocol = tmp_path / "tablet.toml"
    protocol.write_text(text.replace("[batch]\nsize = 4\n", "[batch]\nsize = 4\nleast_worth = 0.01\n"),
                        encoding="utf-8")
    runs = PROTOCOLS / "tablet_blend_runs.csv"

    def plan(out, *more):
        res = CliRunner().invoke(app, ["plan", str(protocol), str(runs), "--out", str(out), "--pool", "300",
                                       "--seed", "3", *more], catch_exceptions=False)
        assert res.exit_code == 0, res.output
        return json.loads((out / "decisions.jsonl").read_text().splitlines()[0])["body"]

    body = plan(tmp_path / "a")
    stop = [m for m in body["messages"] if m.startswith("the batch stopped at")]
    assert len(stop) == 1 and len(body["proposals"]) < 4
    k = len(body["proposals"])
    assert f"pick {k + 1} would be worth ei " in stop[0] and "below batch.least_worth 0.01" in stop[0]
    notes = next((tmp_path / "a").glob("plan-*.notes.txt")).read_text(encoding="utf-8")
    assert f"note: {stop[0]}" in notes
    forced = plan(tmp_path / "b", "--count", "4")
    assert len(forced["proposals"]) == 4
    assert not any("batch stopped" in m for m in forced["messages"])
