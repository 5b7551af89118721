"""Simulated campaigns: strategies, summaries, determinism, parallel runs and the CLI."""

from __future__ import annotations

import csv
import io
import json

import numpy as np
import pytest
from sklearn.linear_model import LinearRegression
from sklearn.preprocessing import PolynomialFeatures
from typer.testing import CliRunner

from guardband.planner.app.simulate_options import parse_noise
from guardband.planner.cli import app
from guardband.planner.inputs.protocol import parse_protocol
from guardband.planner.simulation import (
    PLANNER_STRATEGIES,
    PROBLEMS,
    STRATEGIES,
    CampaignHistory,
    SimulationResult,
    combine_settings,
    get_problem,
    run_campaign,
    run_classical,
    run_random,
    simulate,
    strategy_protocol,
)
from guardband.planner.simulation.problems import gramacy_protocol_dict
from guardband.planner.simulation.quadratic import fit_quadratic
from guardband.planner.simulation.results import _quantiles
from guardband.planner.simulation.strategies import SCREEN_OFF

#: Small and fast planner settings: pool 200, no refinement, one restart.
FAST = parse_protocol({**gramacy_protocol_dict(batch=3, rule="pi", threshold=0.9),
                       "batch": {"size": 3, "pool": 200, "refine": 0},
                       "model": {"restarts": 1}})
TINY = dict(budget=3, seeds=2, n_start=6, pool_size=200)


def _noise_free(truth, rng):
    return {k: np.asarray(v, float).copy() for k, v in truth.items()}


@pytest.fixture(scope="module")
def small():
    return simulate("gramacy", FAST, workers=1, strategies=STRATEGIES, **TINY)


# ------------------------------------------------------------ settings
def test_settings_come_from_the_settings_protocol_and_the_world_from_the_problem():
    problem = PROBLEMS["tablet"]
    combined = combine_settings(problem, FAST)
    assert combined.factor_names == problem.protocol.factor_names
    assert combined.limits == problem.protocol.limits
    assert combined.screen.threshold == 0.9 and combined.ranking.rule == "pi"
    assert (combined.batch.size, combined.batch.pool, combined.batch.refine) == (3, 200, 0)
    assert combined.model == FAST.model  # restarts and the limit models' length-scale cap
    assert combine_settings(problem, None) == problem.protocol


def test_screen_off_sets_every_probability_tiny_and_keeps_hard_rules():
    dose = PROBLEMS["dose"].protocol
    off = strategy_protocol(dose, "screen-off")
    assert off.screen.threshold == SCREEN_OFF and off.screen.joint == "independent"
    assert all(lim.probability == SCREEN_OFF for lim in off.limits)
    assert off.screen.max_step == dose.screen.max_step and off.start == dose.start
    assert strategy_protocol(dose, "mean").ranking.rule == "mean"
    assert strategy_protocol(dose, "random") is None
    with pytest.raises(ValueError, match="unknown strategy 'best'"):
        strategy_protocol(dose, "best")


@pytest.mark.parametrize(("values", "expected"), [
    ([], (0.0, {})),
    (["1"], (1.0, {})),
    (["0.5", "c1=0.01"], (0.5, {"c1": 0.01})),
    (["f=0.2"], (1.0, {"f": 0.2})),
], ids=["none", "scale", "scale-and-sd", "sd-only"])
def test_parse_noise(values, expected):
    assert parse_noise(values, PROBLEMS["gramacy"]) == expected


@pytest.mark.parametrize(("values", "message"), [
    (["x9=1"], "'x9' is not a response of problem 'gramacy'"),
    (["-1"], "must be a finite number >= 0"),
    (["a"], "'a' is not a number"),
    (["1", "2"], "give one scale only"),
], ids=["unknown-response", "negative", "text", "two-scales"])
def test_parse_noise_refuses(values, message):
    with pytest.raises(ValueError, match=message):
        parse_noise(values, PROBLEMS["gramacy"])


# ------------------------------------------------------------ quadratic models
def test_full_quadratic_matches_scikit_learn():
    # reference library: PolynomialFeatures(2) + LinearRegression on the same data
    space = PROBLEMS["gramacy"].protocol.design_space()
    rng = np.random.default_rng(0)
    X = space.sample(30, rng=rng)
    y = np.sin(3 * X[:, 0]) + X[:, 1] ** 3
    model = fit_quadratic(X, y, space)
    assert model.kind == "full" and len(model.terms) == 6
    ref = LinearRegression().fit(PolynomialFeatures(2).fit_transform(X), y)
    Xn = space.sample(50, rng=rng)
    assert np.allclose(model.predict(Xn), ref.predict(PolynomialFeatures(2).fit_transform(Xn)),
                       rtol=1e-8, atol=1e-10)


def test_scheffe_quadratic_recovers_a_mixture_polynomial_exactly():
    # Scheffé (1958) canonical quadratic, no intercept (from memory)
    space = PROBLEMS["tablet"].protocol.design_space()
    rng = np.random.default_rng(1)
    X = space.sample(40, rng=rng)
    b = rng.normal(size=4)
    B = rng.normal(size=(4, 4))

    def truth(Z):
        return Z @ b + sum(B[i, j] * Z[:, i] * Z[:, j] for i in range(4) for j in range(i + 1, 4))

    model = fit_quadratic(X, truth(X), space)
    assert model.kind == "scheffe" and len(model.terms) == 10 and "1" not in model.terms
    Xn = space.sample(25, rng=rng)
    assert np.allclose(model.predict(Xn), truth(Xn), rtol=1e-8, atol=1e-8)


def test_quadratic_with_too_few_runs_reports_its_rank():
    space = PROBLEMS["coating"].protocol.design_space()
    X = space.sample(10, rng=np.random.default_rng(2))
    model = fit_quadratic(X, X[:, 0], space)
    assert len(model.terms) == 28 and model.rank == 10


# ------------------------------------------------------------ strategies
@pytest.mark.parametrize("name", ["tablet", "dose", "coating"])
def test_random_and_classical_runs_stay_inside_the_design_space(name):
    problem = PROBLEMS[name]
    protocol = problem.protocol
    space = protocol.design_space()
    X_start = space.sample(5, rng=np.random.default_rng(3))
    rnd = run_random(problem, protocol, X_start=X_start, budget=12, seed=4, measure=_noise_free)
    cls = run_classical(problem, protocol, n_runs=17, n_start=5, seed=5, measure=_noise_free,
                        pool_size=2000)
    for h in (rnd, cls):
        assert h.X.shape == (17, len(protocol.factors))
        assert np.all(space.contains(h.X))
        assert h.planned.sum() == 12 and not h.planned[:5].any()
    assert np.array_equal(rnd.X[:5], X_start)


def test_classical_confirmation_run_meets_the_fitted_limits_on_a_quadratic_world():
    # when the truth is quadratic the fitted models are exact, so the
    # confirmation run meets every limit (it sits on a limit, so up to
    # rounding) and no sampled feasible point beats it
    problem = PROBLEMS["gramacy"]
    protocol = problem.protocol

    def world(X):
        return {"f": X[:, 0] + X[:, 1], "c1": 0.8 - X[:, 0] - X[:, 1] ** 2, "c2": X[:, 0] ** 2 - 0.5}

    quad = type(problem)(**{**problem.__dict__, "evaluate": world})
    h = run_classical(quad, protocol, n_runs=16, n_start=6, seed=1, measure=_noise_free, pool_size=4000)
    x = h.X[-1]
    assert h.T["c1"][-1] <= 1e-6 and h.T["c2"][-1] <= 1e-6
    Xs = protocol.design_space().sample(20000, rng=np.random.default_rng(9))
    W = world(Xs)
    ok = (W["c1"] <= 0) & (W["c2"] <= 0)
    assert x[0] + x[1] <= np.min(W["f"][ok]) + 1e-6


def test_campaign_stops_when_the_screen_passes_nothing():
    # a limit needing more runs than the start has vouches for nothing (fail closed)
    data = gramacy_protocol_dict()
    data["limits"][0]["min_runs"] = 50
    data["batch"] = {"size": 2, "pool": 100, "refine": 0}
    protocol = parse_protocol(data)
    h = run_campaign(protocol, PROBLEMS["gramacy"].evaluate, n_start=6, budget=4, seed=0)
    assert h.stalled and h.planned.sum() == 0 and "no candidate passed" in h.message


def test_histories_have_the_right_shape(small):
    assert small.strategies == STRATEGIES
    assert small.same_as == {"pi": "protocol"}  # the FAST settings rank by "pi"
    for st in STRATEGIES:
        hs = small.histories[st]
        assert len(hs) == 2
        for h in hs:
            n = h.X.shape[0]
            assert h.X.shape[1] == 2 and n <= 9
            assert h.planned.sum() == n - 6 and h.broke_limit.shape == (n,)
            assert set(h.Y) == {"f", "c1", "c2"} and all(v.shape == (n,) for v in h.Y.values())
        tr = small.trajectories(st)
        assert all(v.shape == (2, 4) for v in tr.values())
    for st in PLANNER_STRATEGIES:
        for h in small.histories[st]:
            assert np.all(np.isfinite(h.promised[h.planned])) and np.all(np.isnan(h.promised[~h.planned]))


def test_starting_runs_are_shared_by_every_strategy_but_classical(small):
    for s in range(2):
        first = small.histories["protocol"][s].X[:6]
        for st in STRATEGIES:
            if st != "classical":
                assert np.array_equal(small.histories[st][s].X[:6], first)


def test_equal_protocols_share_their_campaigns():
    res = simulate("gramacy", FAST, workers=1, budget=1, seeds=1, n_start=6, pool_size=100,
                   strategies=("protocol", "pi", "random"))
    assert res.same_as == {"pi": "protocol"}
    assert res.histories["pi"][0] is res.histories["protocol"][0]
    assert "pi (= protocol)" in res.table_text()


def test_the_settings_line_gives_the_pool_the_campaigns_used():
    """--pool overrides the protocol's pool: the description said the protocol's (pool 200 here)."""
    res = simulate("gramacy", FAST, workers=1, budget=1, seeds=1, n_start=6, pool_size=100,
                   strategies=("protocol",))
    assert "pool 100," in " ".join(res.description()) and "pool 200" not in " ".join(res.description())
    res = simulate("gramacy", FAST, workers=1, budget=1, seeds=1, n_start=6, strategies=("protocol",))
    assert "pool 200," in " ".join(res.description())


def test_results_are_deterministic_for_a_fixed_seed(small):
    some = ("protocol", "random", "classical", "screen-off")
    again = simulate("gramacy", FAST, workers=1, strategies=some, **TINY)
    other = simulate("gramacy", FAST, workers=1, seed=1, strategies=("random",), **TINY)
    for st in some:
        for a, b in zip(small.histories[st], again.histories[st]):
            assert np.array_equal(a.X, b.X) and np.array_equal(a.best_safe, b.best_safe, equal_nan=True)
    assert not np.array_equal(small.histories["random"][0].X, other.histories["random"][0].X)


def test_parallel_and_serial_runs_agree(small):
    par = simulate("gramacy", FAST, workers=2, strategies=STRATEGIES, **TINY)
    assert par.workers == 2
    for st in STRATEGIES:
        for a, b in zip(small.histories[st], par.histories[st]):
            assert np.array_equal(a.X, b.X)
            assert all(np.array_equal(a.Y[r], b.Y[r]) for r in a.Y)
            assert np.array_equal(a.promised, b.promised, equal_nan=True)


# ------------------------------------------------------------ summaries
def _history(best, broke, n_start=2):
    n = len(best)
    return CampaignHistory(
        X=np.zeros((n, 2)), Y={}, planned=np.arange(n) >= n_start, broke_limit=np.array(broke),
        best_safe=np.array(best, float), promised=np.where(np.arange(n) >= n_start, 0.9, np.nan),
        stalled=False,
    )


def test_summary_medians_quartiles_and_shares():
    problem = PROBLEMS["gramacy"]  # minimise, optimum 0.5998...
    opt = problem.optimum
    hs = [_history([np.nan, 1.0, 0.9, 0.8], [True, False, False, True]),
          _history([np.nan, np.nan, 0.7, 0.7], [True, True, False, False]),
          _history([np.nan, 1.2, 1.2, 0.65], [False, False, True, True])]
    res = SimulationResult(problem, problem.protocol, ("random",), {}, {"random": hs}, 2, 2, 3, 0,
                           0.0, {}, 1)
    rows = {r["planned_runs"]: r for r in res.summary_rows()}
    # reference: numpy quantiles of the finite final values
    gaps = np.array([0.8, 0.7, 0.65]) - opt
    assert rows[2]["gap_median"] == pytest.approx(np.median(gaps))
    assert rows[2]["gap_q25"] == pytest.approx(np.quantile(gaps, 0.25))
    assert rows[2]["broken_pooled"] == pytest.approx(3 / 6)
    assert rows[1]["broken_median"] == pytest.approx(0.0)
    # before any safe run the gap is infinite; the median of (inf, 1.0 - opt, 1.2 - opt) is 1.2 - opt
    assert rows[0]["no_safe_run"] == 1 and rows[0]["gap_median"] == pytest.approx(1.2 - opt)
    assert rows[0]["gap_q75"] == float("inf")
    cal = res.calibration("random")
    assert cal["promised_joint_mean"] == pytest.approx(0.9) and cal["observed_met_share"] == pytest.approx(0.5)


def test_the_downside_counts_planned_runs_worse_than_their_steps_incumbent():
    problem = PROBLEMS["gramacy"]  # minimise: worse is larger
    obj = problem.protocol.objective.name
    h = CampaignHistory(
        X=np.zeros((6, 2)), Y={obj: np.array([1.0, 0.9, 0.95, 0.7, 1.3, 0.8])},
        planned=np.arange(6) >= 2, broke_limit=np.zeros(6, bool), best_safe=np.full(6, np.nan),
        promised=np.where(np.arange(6) >= 2, 0.9, np.nan), stalled=False,
        incumbent=np.array([np.nan, np.nan, 0.9, 0.9, 0.7, np.nan]))  # the last: no incumbent yet
    res = SimulationResult(problem, problem.protocol, ("random",), {}, {"random": [h]}, 2, 4, 1, 0,
                           0.0, {}, 1)
    d = res.downside("random")
    # by hand: 0.95 vs 0.9 (worse by 0.05), 0.7 vs 0.9 (better), 1.3 vs 0.7 (worse by 0.6)
    assert d["n_with_incumbent"] == 3
    assert d["worse_share"] == pytest.approx(2 / 3)
    assert d["mean_shortfall"] == pytest.approx((0.05 + 0.6) / 3)
    assert "planned runs worse than the incumbent" in res.table_text()


def test_true_gap_equals_gap_without_noise(small):
    for st in STRATEGIES:
        tr = small.trajectories(st)
        assert np.array_equal(tr["gap"], tr["gap_true"])


def test_true_gap_is_taken_at_the_run_the_lab_would_pick():
    res = simulate("tablet", None, budget=6, seeds=2, n_start=6, strategies=("random",), workers=1,
                   noise_scale=3.0)
    tr = res.trajectories("random")
    opt = res.problem.optimum
    for s, h in enumerate(res.histories["random"]):
        ok = h.Y["degradant"] <= 0.2  # measured within the limit
        j = np.flatnonzero(ok)[np.argmax(h.Y["dissolution"][ok])]
        assert tr["gap_true"][s, -1] == pytest.approx(opt - h.T["dissolution"][j])
        assert tr["gap"][s, -1] == pytest.approx(opt - h.Y["dissolution"][j])
    assert "true gap at the chosen run" in res.table_text()


def test_quantiles_agree_with_numpy_on_finite_values():
    v = np.random.default_rng(0).normal(size=17)
    assert np.allclose(_quantiles(v), np.quantile(v, [0.25, 0.5, 0.75]))
    assert _quantiles([1.0, 2.0, np.inf]) == [1.5, 2.0, float("inf")]
    assert _quantiles([1.0, np.inf, np.inf]) == [float("inf")] * 3
    assert all(np.isnan(_quantiles([np.nan, np.nan])))  # nothing left


def test_outputs_carry_cautions_and_parse(small):
    text = small.table_text()
    assert "gap to optimum" in text and "calibration of the screen" in text
    rows = list(csv.reader(line for line in io.StringIO(small.csv_text()) if not line.startswith("#")))
    assert rows[0][:3] == ["strategy", "planned_runs", "seeds"] and len(rows) == 1 + len(STRATEGIES) * 4
    assert any(line.startswith("# CAUTION: Simulated against a test problem") for line in small.csv_text().splitlines())
    data = json.loads(json.dumps(small.to_dict(), allow_nan=False))
    assert data["problem"] == "gramacy" and len(data["final"]) == len(STRATEGIES) and data["cautions"]


# ------------------------------------------------------------ command line
def _settings_file(tmp_path):
    path = tmp_path / "fast.toml"
    path.write_text(
        '[study]\ntitle = "fast settings"\nversion = "1"\nauthor = "t"\n'
        '[[factors]]\nname = "x"\nkind = "continuous"\nlower = 0\nupper = 1\n'
        '[objective]\nname = "y"\ndirection = "minimize"\n'
        '[screen]\nthreshold = 0.9\n[ranking]\nrule = "mean"\n'
        '[batch]\nsize = 2\npool = 150\nrefine = 0\n[model]\nrestarts = 1\n', encoding="utf-8")
    return path


def test_cli_simulate_writes_csv_and_prints_a_table(tmp_path):
    out = tmp_path / "sim.csv"
    result = CliRunner().invoke(app, [
        "simulate", str(_settings_file(tmp_path)), "--problem", "gramacy", "--budget", "2",
        "--seeds", "2", "--start", "6", "--workers", "1", "--strategies", "protocol,random,classical",
        "--pool", "200", "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert "rule mean" in result.stdout and "CAUTIONS" in result.stdout
    assert "random" in result.stdout and "classical" in result.stdout
    text = out.read_text(encoding="utf-8")
    body = [line for line in text.splitlines() if not line.startswith("#")]
    assert body[0].startswith("strategy,planned_runs") and len(body) == 1 + 3 * 3


def test_cli_simulate_json_with_problem_settings(tmp_path):
    result = CliRunner().invoke(app, [
        "simulate", "-", "--problem", "dose", "--budget", "2", "--seeds", "1", "--workers", "1",
        "--strategies", "random,classical", "--noise", "1", "--pool", "200", "--format", "json"])
    assert result.exit_code == 0, result.output
    data = json.loads(result.stdout)
    assert data["problem"] == "dose" and data["noise_scale"] == 1.0
    assert {r["strategy"] for r in data["final"]} == {"random", "classical"}
    flag = CliRunner().invoke(app, ["simulate", "--settings-from-problem", "--problem", "dose",
                                    "--budget", "1", "--seeds", "1", "--workers", "1",
                                    "--strategies", "random", "--format", "csv"])
    assert flag.exit_code == 0, flag.output
    assert flag.stdout.splitlines()[-1].startswith("random,1,1,")


@pytest.mark.parametrize(("args", "message"), [
    (["-", "--problem", "nope"], "nope"),
    (["-", "--problem", "gramacy", "--strategies", "random,best"], "unknown strategy 'best'"),
    (["-", "--problem", "gramacy", "--noise", "zz=1"], "'zz' is not a response"),
    (["--problem", "gramacy"], "give a settings protocol"),
], ids=["problem", "strategy", "noise", "no-settings"])
def test_cli_simulate_usage_errors(args, message):
    result = CliRunner().invoke(app, ["simulate", *args])
    assert result.exit_code == 2
    assert message in result.output


def test_cli_simulate_bad_protocol_exits_3(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("[study]\ntitle = 1\n", encoding="utf-8")
    result = CliRunner().invoke(app, ["simulate", str(bad), "--problem", "gramacy", "--seeds", "1"])
    assert result.exit_code == 3 and "Error:" in result.output


def test_settings_carry_the_screen_guards_but_not_the_world():
    problem = get_problem("coating")
    data = problem.protocol.model_dump(mode="python")
    data["screen"].update(short_model=False, widen_from_loo=False)
    data["limits"][0]["measurement_sd"] = 0.5  # the settings' own limits are not the world's
    combined = combine_settings(problem, parse_protocol(data))
    assert combined.screen.short_model is False and combined.screen.widen_from_loo is False
    assert combined.limits[0].measurement_sd == problem.protocol.limits[0].measurement_sd == 0.02
