"""Scenario files: validation with field paths, the optimum of a stated truth, drawn truths, the CLI."""

from __future__ import annotations

import numpy as np
import pytest
from typer.testing import CliRunner

from guardband.planner.cli import app
from guardband.planner.errors import EXIT_PROTOCOL, ProtocolError
from guardband.planner.inputs.protocol import load_protocol, parse_protocol
from guardband.planner.simulation.scenarios import load_scenarios, parse_scenarios
from guardband.safety.limits import met_every_limit

PROTOCOLS = __import__("pathlib").Path(__file__).resolve().parents[1] / "protocols"


def _two_factor_protocol(**objective):
    return parse_protocol({
        "study": {"title": "two factors", "version": "1", "author": "test"},
        "factors": [{"name": "x1", "kind": "continuous", "lower": 0.0, "upper": 1.0},
                    {"name": "x2", "kind": "continuous", "lower": 0.0, "upper": 2.0}],
        "objective": {"name": "y", "direction": "maximize", **objective},
        "limits": [{"name": "g", "upper": 0.6, "probability": 0.9}],
        "screen": {"threshold": 0.9, "min_runs": 3},
        "batch": {"size": 1, "pool": 200, "refine": 0},
        "model": {"restarts": 1},
    })


TRUTH = {"y": "x1 + 0.5 * x2 - 0.3 * (x1 - 0.8) ^ 2", "g": "x1 ^ 2 + 0.25 * x2 ^ 2 / 2"}


def _one(truth=None, **extra) -> dict:
    return {"scenario": [{"name": "s", "truth": dict(truth or TRUTH), **extra}]}


def test_optimum_against_a_dense_grid_on_two_factors():
    protocol = _two_factor_protocol()
    problem = parse_scenarios(_one(), protocol).scenarios[0].problem
    # a 1201 x 1201 grid of the box; the objective's slope is at most about 1.5 per unit,
    # so no feasible grid point may beat the optimum by more than 1.5 times the spacing
    g1, g2 = np.meshgrid(np.linspace(0, 1, 1201), np.linspace(0, 2, 1201))
    G = np.column_stack([g1.ravel(), g2.ravel()])
    Y = problem.evaluate(G)
    ok = met_every_limit(protocol, Y)
    best = float(np.max(Y["y"][ok]))
    step = 2.0 / 1200
    assert problem.optimum >= best - 1e-9
    assert problem.optimum <= best + 1.5 * step
    at = problem.evaluate(np.array([problem.optimum_x]))
    assert at["g"][0] <= 0.6 + 1e-9  # the stated point meets the limit
    assert abs(at["g"][0] - 0.6) < 1e-6  # and the limit binds there
    np.testing.assert_allclose(problem.optimum_x, G[ok][np.argmax(Y["y"][ok])], atol=3 * step)


def _mixed_protocol():
    return parse_protocol({
        "study": {"title": "one continuous, one discrete", "version": "1", "author": "test"},
        "factors": [{"name": "x", "kind": "continuous", "lower": 0.0, "upper": 1.0},
                    {"name": "d", "kind": "discrete", "levels": [0, 1, 2, 3]}],
        "constraints": [{"name": "cap", "rule": "x + 0.25 * d <= 1.3"}],
        "objective": {"name": "y", "direction": "maximize"},
        "limits": [{"name": "g", "upper": 0.8, "probability": 0.9}],
        "screen": {"threshold": 0.9, "min_runs": 3},
        "batch": {"size": 1, "pool": 200, "refine": 0},
        "model": {"restarts": 1},
    })


# the limit binds at the best level, the cap at the highest (d = 3 leaves x <= 0.55)
MIXED_TRUTH = {"y": "x + 0.3 * d - 0.05 * d ^ 2", "g": "x ^ 2 + 0.1 * d"}


def test_with_resolutions_the_optimum_is_the_best_point_the_lab_can_set():
    """Every planned run is rounded to the resolution, so the gap must be measured from the best
    grid point that meets every limit: the known optimum used to lie between grid points (x1 at the
    limit, 0.7746), a gap no campaign could close. Checked against every grid point (exhaustive)."""
    data = _two_factor_protocol().model_dump(mode="python")
    data["factors"][0]["resolution"] = 0.05
    data["factors"][1]["resolution"] = 0.25
    protocol = parse_protocol(data)
    problem = parse_scenarios(_one(), protocol).scenarios[0].problem
    g1, g2 = np.meshgrid(np.arange(0, 21) * 0.05, np.arange(0, 9) * 0.25)
    G = np.column_stack([g1.ravel(), g2.ravel()])
    Y = problem.evaluate(G)
    ok = met_every_limit(protocol, Y)
    best = np.flatnonzero(ok)[np.argmax(Y["y"][ok])]
    assert problem.optimum == pytest.approx(Y["y"][best], abs=1e-12)
    np.testing.assert_allclose(problem.optimum_x, G[best], atol=1e-12)
    unrounded = parse_scenarios(_one(), _two_factor_protocol()).scenarios[0].problem
    assert unrounded.optimum > problem.optimum  # the continuous optimum lies off the grid


def test_optimum_with_discrete_and_continuous_factors_against_a_dense_grid():
    # regression: a protocol with a discrete factor beside continuous ones (a mixture and a pH
    # level) could not be simulated at all: locate_optimum refused mixed design spaces
    protocol = _mixed_protocol()
    problem = parse_scenarios(_one(MIXED_TRUTH), protocol).scenarios[0].problem
    best, best_x = -np.inf, None
    for d in (0.0, 1.0, 2.0, 3.0):  # every level, a 100,001-point grid of x each
        x = np.linspace(0.0, 1.0, 100_001)
        G = np.column_stack([x, np.full_like(x, d)])
        G = G[protocol.design_space().contains(G)]
        Y = problem.evaluate(G)
        ok = met_every_limit(protocol, Y)
        if np.any(ok) and np.max(Y["y"][ok]) > best:
            best, best_x = float(np.max(Y["y"][ok])), G[ok][np.argmax(Y["y"][ok])]
    # by hand: d = 2 gives x <= sqrt(0.6) = 0.7746 (the limit; the cap allows 0.8), y = 1.1746;
    # d = 1: x <= sqrt(0.7) = 0.8367, y = 1.0867; d = 3: x <= 0.55 (the cap), y = 1.0
    assert best == pytest.approx(np.sqrt(0.6) + 0.4, abs=1e-5)
    assert problem.optimum == pytest.approx(best, abs=1e-5)
    np.testing.assert_allclose(problem.optimum_x, best_x, atol=1e-4)
    assert problem.optimum_x[1] == 2.0  # on a level, not between levels
    # the objective's range rides along for the gap's scale: over the space, y runs from 0 (x = 0,
    # d = 0) to 1.25 (x = 1, d = 1: beyond the limit but inside the space)
    assert problem.tags["objective_range"] == pytest.approx(1.25, abs=0.02)


MIXED_TOML = """
[study]
title = "one continuous, one discrete"
version = "1"
author = "test"
[[factors]]
name = "x"
kind = "continuous"
lower = 0.0
upper = 1.0
[[factors]]
name = "d"
kind = "discrete"
levels = [0, 1, 2, 3]
[[constraints]]
name = "cap"
rule = "x + 0.25 * d <= 1.3"
[objective]
name = "y"
direction = "maximize"
[[limits]]
name = "g"
upper = 0.8
probability = 0.9
[screen]
threshold = 0.9
min_runs = 3
[batch]
size = 1
pool = 200
refine = 0
[model]
restarts = 1
"""


def test_cli_simulates_a_protocol_with_discrete_and_continuous_factors(tmp_path):
    (tmp_path / "mixed.toml").write_text(MIXED_TOML, encoding="utf-8")
    truth = "\n".join(f'{k} = "{v}"' for k, v in MIXED_TRUTH.items())
    (tmp_path / "truth.toml").write_text(f'[[scenario]]\nname = "s"\n[scenario.truth]\n{truth}\n', encoding="utf-8")
    result = CliRunner().invoke(app, ["simulate", str(tmp_path / "mixed.toml"), "--scenarios",
                                      str(tmp_path / "truth.toml"), "--start", "5", "--seeds", "1",
                                      "--budget", "2", "--workers", "1"])
    assert result.exit_code == 0, result.output
    flat = " ".join(result.stdout.split())
    # each coordinate named by its factor (an unnamed tuple of eight numbers read poorly)
    assert "known optimum 1.17459" in flat and "at (x=0.77459" in flat and ", d=2)" in flat
    assert "(within 0.0125)" in flat  # 1% of the objective's range, 1.25


def test_noise_defaults_to_the_protocols_measurement_sd():
    protocol = _two_factor_protocol(measurement_sd=0.7)
    problem = parse_scenarios(_one(noise={"g": 0.01}), protocol).scenarios[0].problem
    assert problem.noise == {"y": 0.7, "g": 0.01}


@pytest.mark.parametrize(("data", "message"), [
    ({"scenario": [{"name": "s", "truth": TRUTH, "colour": 1}]}, "scenario[0].colour: unknown key"),
    ({"scenarios": []}, "scenario: this field is required"),
    (_one({"y": "x1"}), "scenario[0].truth: no formula for g"),
    (_one({**TRUTH, "h": "x1"}), "scenario[0].truth.h: not a response"),
    (_one({**TRUTH, "g": "x1 + $x2"}), "scenario[0].truth.g: cannot read the formula: unexpected character '$' "
                                       "at position 6"),
    (_one({**TRUTH, "g": "x1 + dose"}), "scenario[0].truth.g: cannot read the formula: unknown name 'dose' "
                                        "at position 6"),
    (_one({**TRUTH, "g": "log(x1 - 0.5)"}), "scenario[0].truth.g: the formula is not a finite number at"),
    (_one(noise={"z": 1.0}), "scenario[0].noise.z: not a response"),
    (_one(noise={"y": -1.0}), "scenario[0].noise.y: must be a finite number >= 0"),
    (_one(cohort={"g": 6}), "scenario[0].cohort.g: a rate measured out of a cohort must lie in [0, 1]"),
    ({"scenario": [{"name": "s", "truth": TRUTH}, {"name": "s", "truth": TRUTH}]},
     "scenario[1].name: 's' is used twice"),
    (_one(draw_from_runs="runs.csv"), "scenario[0]: give either truth"),
    (_one({**TRUTH, "g": "x1 + 5"}), "no point of the design space meets every limit"),
    ({"budget": 0, **_one()}, "budget: Input should be greater than or equal to 1"),
], ids=["unknown-key", "no-scenario", "missing", "extra", "character", "name", "domain", "noise-key",
        "noise-sign", "cohort", "twice", "both", "infeasible", "budget"])
def test_bad_scenario_files_name_the_field(data, message):
    with pytest.raises(ProtocolError) as info:
        parse_scenarios(data, _two_factor_protocol(), source="mine.toml")
    assert f"mine.toml: {message}" in str(info.value) or message in str(info.value)
    assert str(info.value).startswith("mine.toml")
    assert ProtocolError.exit_code == EXIT_PROTOCOL


@pytest.mark.parametrize(("data", "hint"), [
    ({"budgett": 6, **_one()}, "budgett: unknown key; did you mean `budget`?"),
    ({"scenario": [{"name": "s", "truth": TRUTH, "nose": {"y": 1.0}}]},
     "scenario[0].nose: unknown key; did you mean `noise`?"),
    ({"scenario": [{"name": "s", "truth": TRUTH, "colour": 1}]},
     "scenario[0].colour: unknown key; check its spelling (see the README, \"Simulating your own study\")"),
], ids=["top-level", "in-a-scenario", "no-close-key"])
def test_a_misspelt_key_of_a_scenario_file_is_hinted_from_the_scenario_files_own_keys(data, hint):
    """Not from the protocol's: a scenario file's keys are not in docs/protocol-reference.md."""
    with pytest.raises(ProtocolError) as info:
        parse_scenarios(data, _two_factor_protocol(), source="mine.toml")
    assert str(info.value) == f"mine.toml: {hint}"


def test_example_scenario_files_load_and_each_optimum_meets_every_limit():
    for stem in ("tablet_blend", "dose_combination"):
        protocol = load_protocol(PROTOCOLS / f"{stem}.toml")
        found = load_scenarios(PROTOCOLS / "scenarios" / f"{stem}_scenarios.toml", protocol)
        assert len(found.scenarios) >= 3
        for sc in found.scenarios:
            if sc.drawn:
                continue
            x = np.array([sc.problem.optimum_x])
            y = sc.problem.evaluate(x)
            assert met_every_limit(protocol, y)[0]
            assert bool(protocol.design_space().contains(x)[0])
            assert y[protocol.objective.name][0] == pytest.approx(sc.problem.optimum)


def test_drawn_truths_are_one_per_seed_and_repeatable():
    protocol = load_protocol(PROTOCOLS / "tablet_blend.toml")
    found = load_scenarios(PROTOCOLS / "scenarios" / "tablet_blend_scenarios.toml", protocol)
    drawn = next(sc for sc in found.scenarios if sc.drawn)
    a, b, a2 = drawn.problem_for(0, 0), drawn.problem_for(0, 1), drawn.problem_for(0, 0)
    X = protocol.design_space().sample(20, rng=np.random.default_rng(3))
    ya, yb, ya2 = a.evaluate(X), b.evaluate(X), a2.evaluate(X)
    assert np.array_equal(ya["friability"], ya2["friability"]) and a.optimum == a2.optimum
    assert not np.allclose(ya["friability"], yb["friability"])
    assert met_every_limit(protocol, a.evaluate(np.array([a.optimum_x])))[0]
    # the noise of a drawn truth is the fitted model's, as no sd is stated
    assert all(sd > 0 for sd in a.noise.values())


def test_cli_bad_scenario_file_exits_3_and_writes_nothing(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text('[[scenario]]\nname = "s"\n[scenario.truth]\ndissolution_30min = "1 +"\n', encoding="utf-8")
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["simulate", str(PROTOCOLS / "tablet_blend.toml"), "--scenarios", str(bad),
                                      "--seeds", "1", "--out-dir", str(out)])
    assert result.exit_code == EXIT_PROTOCOL
    assert "bad.toml: scenario[0].truth" in result.output
    assert not out.exists()


@pytest.mark.slow
def test_cli_simulates_the_protocols_own_limit_not_the_problems(tmp_path):
    # the reported bug: with the dose protocol, simulate printed the built-in problem's
    # limit (tox_rate <= 0.25 with probability >= 0.95) instead of the protocol's own
    dose = str(PROTOCOLS / "dose_combination.toml")
    scenarios = str(PROTOCOLS / "scenarios" / "dose_combination_scenarios.toml")
    result = CliRunner().invoke(app, ["simulate", dose, "--scenarios", scenarios, "--seeds", "1",
                                      "--budget", "2", "--workers", "1", "--pool", "200"])
    assert result.exit_code == 0, result.output
    flat = " ".join(result.stdout.split())  # the table format wraps long lines at 100 columns
    assert "limits: dlt_rate <= 0.25 fraction of cohort" in flat and "with probability >= 0.9" in flat
    assert "tox_rate" not in result.output
    # on a built-in problem the problem's world is simulated, and now the output says so
    old = CliRunner().invoke(app, ["simulate", dose, "--problem", "dose", "--seeds", "1", "--budget", "1",
                                   "--workers", "1", "--strategies", "random"])
    assert old.exit_code == 0, old.output
    assert "note: the built-in problem 'dose' is simulated on its own factors" in old.output
    assert "dlt_rate <= 0.25" in old.output and "--scenarios FILE" in old.output
    same = CliRunner().invoke(app, ["simulate", "-", "--problem", "dose", "--seeds", "1", "--budget", "1",
                                    "--workers", "1", "--strategies", "random"])
    assert same.exit_code == 0 and "note:" not in same.output


def test_optimum_search_does_not_stop_short_of_the_limits():
    # regression: in the pessimistic tablet truth SLSQP stopped a hair outside a limit (a failed
    # line search) and every polished point was dropped, leaving the best sample (29.6, neither
    # limit binding) as the "optimum". Dissolution there rises with croscarmellose and falls with
    # force, which the degradant and friability limits stop: both must bind at the optimum.
    protocol = load_protocol(PROTOCOLS / "tablet_blend.toml")
    found = load_scenarios(PROTOCOLS / "scenarios" / "tablet_blend_scenarios.toml", protocol)
    for sc in found.scenarios:
        if sc.drawn:
            continue
        at = sc.problem.evaluate(np.array([sc.problem.optimum_x]))
        assert at["degradant_b"][0] == pytest.approx(0.2, abs=1e-6), sc.name
        assert at["friability"][0] == pytest.approx(1.0, abs=1e-6), sc.name
        X = protocol.design_space().sample(20_000, rng=np.random.default_rng(99))
        Y = sc.problem.evaluate(X)
        ok = met_every_limit(protocol, Y)
        assert np.max(Y["dissolution_30min"][ok]) <= sc.problem.optimum + 1e-9


@pytest.mark.skipif(not hasattr(__import__("os"), "mkfifo"), reason="no FIFOs on this system")
def test_a_scenario_file_is_read_as_every_input_is(tmp_path):
    """A FIFO is refused at once (never waited on), a deep table is a named refusal, not a crash:
    the scenario file goes through the same reader as the protocol."""
    import os

    protocol = load_protocol(PROTOCOLS / "tablet_blend.toml")
    fifo = tmp_path / "scenarios.toml"
    os.mkfifo(fifo)
    with pytest.raises(ProtocolError, match="not a regular file|FIFO|fifo"):
        load_scenarios(fifo, protocol)
    deep = tmp_path / "deep.toml"
    deep.write_text("x = " + "[" * 3000 + "]" * 3000 + "\n", encoding="utf-8")
    with pytest.raises(ProtocolError, match="deep.toml"):
        load_scenarios(deep, protocol)
    latin = tmp_path / "latin.toml"
    latin.write_bytes("note = \"d\xe9j\xe0\"\n".encode("latin-1"))
    with pytest.raises(ProtocolError, match="latin.toml: the scenario is not UTF-8 text"):
        load_scenarios(latin, protocol)
