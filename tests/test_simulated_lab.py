"""scripts/simulated_lab.py: runs in progress measured under a scenario's truth, the rest left alone.

The truth it must give is the scenario file's own formula: with the noise
off, every measured cell is checked against that formula written out again
here in numpy (the reference is ``protocols/scenarios/*.toml`` itself).
"""

from __future__ import annotations

import importlib.util

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from guardband.planner.cli import app
from guardband.planner.errors import EXIT_PROTOCOL

from conftest import PROTOCOLS, ROOT

TABLET = PROTOCOLS / "tablet_blend.toml"
DOSE = PROTOCOLS / "dose_combination.toml"
TABLET_SCENARIOS = PROTOCOLS / "scenarios" / "tablet_blend_scenarios.toml"
DOSE_SCENARIOS = PROTOCOLS / "scenarios" / "dose_combination_scenarios.toml"


def lab(*args) -> int:
    spec = importlib.util.spec_from_file_location("simulated_lab", ROOT / "scripts" / "simulated_lab.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module.main([str(a) for a in args])


def start(protocol, out, n=4):
    res = CliRunner().invoke(app, ["start", str(protocol), "--runs", str(n), "--seed", "3", "--out", str(out)])
    assert res.exit_code == 0, res.output


def logistic(x):
    return 1 / (1 + np.exp(-x))


def tablet_expected(f: pd.DataFrame) -> dict:
    """The scenario "expected" of tablet_blend_scenarios.toml, written out again."""
    return {
        "dissolution_30min": 100 * logistic(-0.5 + 60 * f.croscarmellose - 15 * f.povidone - 100 * f.mg_stearate
                                            + 1.5 * f.lactose - 0.08 * f.force),
        "degradant_b": 0.04 + 2.8 * f.croscarmellose + 1.2 * f.povidone + 2 * f.mg_stearate,
        "friability": 0.25 + 30 / f.force ** 2 + 0.6 * f.lactose - 2 * f.povidone,
    }


def test_without_noise_every_run_in_progress_gets_the_scenarios_formula(tmp_path):
    start(TABLET, tmp_path / "s.csv")
    assert lab(TABLET, TABLET_SCENARIOS, "--scenario", "expected", "--runs", tmp_path / "s.csv",
               "--out", tmp_path / "m.csv", "--noise-scale", 0) == 0
    design, measured = pd.read_csv(tmp_path / "s.csv"), pd.read_csv(tmp_path / "m.csv")
    assert list(measured["run_id"]) == list(design["run_id"])
    for name, truth in tablet_expected(measured).items():
        # written with 6 significant digits
        np.testing.assert_allclose(measured[name], truth, rtol=1e-5, err_msg=name)
    assert measured["notes"].str.endswith("simulated lab, scenario expected").all()


def test_with_noise_the_values_scatter_around_the_formula_and_the_seed_repeats_them(tmp_path):
    start(TABLET, tmp_path / "s.csv", n=8)
    for k in (1, 2):
        assert lab(TABLET, TABLET_SCENARIOS, "--scenario", "expected", "--runs", tmp_path / "s.csv",
                   "--out", tmp_path / f"m{k}.csv", "--seed", 5) == 0
    a, b = pd.read_csv(tmp_path / "m1.csv"), pd.read_csv(tmp_path / "m2.csv")
    pd.testing.assert_frame_equal(a, b)
    error = a["dissolution_30min"] - tablet_expected(a)["dissolution_30min"]
    assert (error != 0).all() and (error.abs() < 6 * 1.5).all()  # the scenario's sd is 1.5


def test_measured_runs_stay_and_the_last_plan_is_appended_once(tmp_path):
    camp = tmp_path / "camp"
    runs = PROTOCOLS / "tablet_blend_runs.csv"
    res = CliRunner().invoke(app, ["plan", str(TABLET), str(runs), "--out", str(camp), "--pool", "200",
                                   "--count", "2", "--by", "tests"])
    assert res.exit_code == 0, res.output
    assert lab(TABLET, TABLET_SCENARIOS, "--scenario", "expected", "--runs", runs, "--campaign", camp,
               "--out", tmp_path / "next.csv") == 0
    before, after = pd.read_csv(runs), pd.read_csv(tmp_path / "next.csv")
    plan = pd.read_csv(next(camp.glob("plan-*.csv")))
    pd.testing.assert_frame_equal(after.iloc[:len(before)], before)  # the measured runs, untouched
    added = after.iloc[len(before):].reset_index(drop=True)
    assert list(added["run_id"]) == list(plan["run_id"])
    np.testing.assert_allclose(added[["mcc", "lactose", "force"]], plan[["mcc", "lactose", "force"]])
    assert added["dissolution_30min"].notna().all()
    # again on its own output: nothing new to append, nothing in progress
    assert lab(TABLET, TABLET_SCENARIOS, "--scenario", "expected", "--runs", tmp_path / "next.csv",
               "--campaign", camp, "--out", tmp_path / "again.csv") == 0
    pd.testing.assert_frame_equal(pd.read_csv(tmp_path / "again.csv"), after)


def test_a_binomial_limit_is_measured_as_a_count_out_of_the_scenarios_cohort(tmp_path):
    start(DOSE, tmp_path / "s.csv", n=4)
    assert lab(DOSE, DOSE_SCENARIOS, "--scenario", "expected", "--runs", tmp_path / "s.csv",
               "--out", tmp_path / "m.csv", "--seed", 1) == 0
    m = pd.read_csv(tmp_path / "m.csv")
    assert (m["dlt_subjects"] == 6).all()
    assert m["dlt_events"].between(0, 6).all() and (m["dlt_events"] == m["dlt_events"].round()).all()


@pytest.mark.parametrize("name, words", [("nowhere", "no scenario named 'nowhere'"),
                                         ("like-the-runs", "draws its truth per campaign")])
def test_a_scenario_it_cannot_use_is_refused_and_nothing_is_written(tmp_path, capsys, name, words):
    start(TABLET, tmp_path / "s.csv")
    code = lab(TABLET, TABLET_SCENARIOS, "--scenario", name, "--runs", tmp_path / "s.csv",
               "--out", tmp_path / "m.csv")
    assert code == EXIT_PROTOCOL and words in capsys.readouterr().err
    assert not (tmp_path / "m.csv").exists()


def test_a_binomial_objective_is_measured_as_counts_with_the_protocols_cohort(tmp_path):
    # the objective a response rate (counts), the cohort from escalation.cohort_size: without noise
    # the responders are the true rate times six, rounded (the formula written out again here)
    text = DOSE.read_text(encoding="utf-8").replace(
        'name = "response_score"\ndirection = "maximize"\nunit = "score"',
        'name = "response_rate"\ndirection = "maximize"\nkind = "binomial"\nevents = "responders"\n'
        'subjects = "treated"')
    protocol = tmp_path / "rate.toml"
    protocol.write_text(text, encoding="utf-8")
    scenarios = tmp_path / "rate_scenarios.toml"
    scenarios.write_text('[[scenario]]\nname = "r"\n[scenario.truth]\n'
                         'response_rate = "logistic(-2 + 0.04 * dose_a + 0.3 * dose_b)"\n'
                         'dlt_rate = "logistic(-3.6 + 0.045 * dose_a + 0.3 * dose_b)"\n', encoding="utf-8")
    start(protocol, tmp_path / "s.csv", n=4)
    assert lab(protocol, scenarios, "--scenario", "r", "--runs", tmp_path / "s.csv", "--out", tmp_path / "m.csv",
               "--noise-scale", 0) == 0
    m = pd.read_csv(tmp_path / "m.csv")
    assert (m["treated"] == 6).all() and (m["dlt_subjects"] == 6).all()
    np.testing.assert_array_equal(m["responders"], np.rint(6 * logistic(-2 + 0.04 * m.dose_a + 0.3 * m.dose_b)))
