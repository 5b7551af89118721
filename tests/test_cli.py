"""The command line as a user meets it: files under tmp_path, exit codes, stderr."""

import csv
import io
import json
import re
import shutil

import pytest
from typer.testing import CliRunner

from guardband.planner.cli import app
from guardband.planner.errors import EXIT_NO_SAFE, EXIT_PROTOCOL, EXIT_VERIFY

from conftest import PROTOCOLS

runner = CliRunner()


def run(*args):
    return runner.invoke(app, [str(a) for a in args], catch_exceptions=False)


def data_rows(text):
    return [r for r in csv.reader(io.StringIO(text)) if r and not r[0].startswith("#")]


def test_every_command_has_help():
    import typer.main

    group = typer.main.get_command(app)
    assert set(group.commands) >= {"check", "start", "plan", "verify", "replay", "demo"}
    for name, command in group.commands.items():
        assert command.help and len(command.help) > 20, name
        res = run(name, "--help")
        assert res.exit_code == 0 and "Usage" in res.output


@pytest.mark.parametrize("protocol", sorted(PROTOCOLS.glob("*.toml")), ids=lambda p: p.name)
def test_check_every_example_protocol(protocol):
    res = run("check", protocol)
    assert res.exit_code == 0, res.output
    assert "fingerprint" in res.output and "CAUTIONS" in res.output
    js = run("check", protocol, "--format", "json")
    data = json.loads(js.stdout)
    assert len(data["protocol"]["fingerprint"]) == 64
    assert data["cautions"]
    for f in data["factors"]:
        assert f["reach_low"] <= f["centre"] + 1e-9 and f["centre"] <= f["reach_high"] + 1e-9


def _without_limits(tmp_path):
    """The tablet protocol with every [[limits]] table dropped."""
    lines = (PROTOCOLS / "tablet_blend.toml").read_text().splitlines()
    kept, skip = [], False
    for line in lines:  # drop every [[limits]] table
        if line.startswith("["):
            skip = line.strip() == "[[limits]]"
        if not skip:
            kept.append(line)
    bare = tmp_path / "no_limits.toml"
    bare.write_text("\n".join(kept) + "\n")
    return bare


def test_check_says_a_protocol_without_limits_leaves_the_screen_nothing_to_check(tmp_path):
    bare = _without_limits(tmp_path)
    res = run("check", bare)
    assert res.exit_code == 0, res.output
    assert "limits: none; the safety screen checks nothing" in res.stdout
    assert "the safety screen checks nothing" not in run("check", PROTOCOLS / "tablet_blend.toml").stdout


def test_check_json_and_csv_say_a_protocol_without_limits_leaves_the_screen_nothing_to_check(tmp_path):
    bare = _without_limits(tmp_path)
    data = json.loads(run("check", bare, "--format", "json").stdout)
    assert data["limits"] == []
    assert any("the safety screen checks nothing" in n for n in data["notes"]), data["notes"]
    res = run("check", bare, "--format", "csv")
    assert res.exit_code == 0, res.output
    assert "the safety screen checks nothing" in res.stderr  # with the fingerprint, among the notes
    assert "the safety screen checks nothing" not in res.stdout  # the table stays a plain table
    assert data_rows(res.stdout)[0][0] == "factor"
    tablet = PROTOCOLS / "tablet_blend.toml"
    assert json.loads(run("check", tablet, "--format", "json").stdout)["notes"] == []
    assert "the safety screen checks nothing" not in run("check", tablet, "--format", "csv").stderr


def test_check_empty_design_space(tmp_path):
    text = (PROTOCOLS / "tablet_blend.toml").read_text()
    # a ratio rule that cannot hold together with the bounds of mcc and lactose
    text = text.replace('rule = "mcc / lactose <= 4"', 'rule = "mcc >= 2 * lactose + 0.45"')
    bad = tmp_path / "empty.toml"
    bad.write_text(text)
    res = run("check", bad)
    assert res.exit_code == EXIT_PROTOCOL
    assert "the design space is empty" in res.stderr
    assert "filler ratio" in res.stderr


def test_an_empty_design_space_is_refused_naming_the_protocol_file_by_every_command(tmp_path):
    """check, start, plan and judge said "the design space is empty" without the file's name."""
    text = (PROTOCOLS / "tablet_blend.toml").read_text()
    bad = tmp_path / "empty.toml"
    bad.write_text(text.replace('rule = "mcc / lactose <= 4"', 'rule = "mcc >= 2 * lactose + 0.45"'))
    runs = PROTOCOLS / "tablet_blend_runs.csv"
    recipes = PROTOCOLS / "tablet_blend_recipes.csv"
    for args in (["check", bad], ["start", bad, "--runs", 3, "--out", tmp_path / "s.csv"],
                 ["plan", bad, runs, "--out", tmp_path / "c"], ["judge", bad, runs, recipes, "--out", tmp_path / "c"]):
        res = runner.invoke(app, [str(a) for a in args])
        assert res.exit_code == EXIT_PROTOCOL, (args[0], res.output)
        assert "empty.toml: the design space is empty" in res.stderr, (args[0], res.stderr)
    assert not (tmp_path / "c").exists() and not (tmp_path / "s.csv").exists()


def test_check_bad_protocol_names_field(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text((PROTOCOLS / "tablet_blend.toml").read_text().replace("threshold = 0.90", "threshold = 1.5"))
    res = run("check", bad)
    assert res.exit_code == EXIT_PROTOCOL
    assert "bad.toml: screen.threshold: Input should be less than 1" in res.stderr
    assert "Traceback" not in res.output


@pytest.mark.parametrize("protocol", sorted(PROTOCOLS.glob("*.toml")), ids=lambda p: p.name)
def test_start_writes_fillable_design(tmp_path, protocol):
    out = tmp_path / "start.csv"
    res = run("start", protocol, "--runs", 7, "--out", out, "--format", "csv")
    assert res.exit_code == 0, res.output
    rows = data_rows(out.read_text())
    assert rows[0][0] == "run_id" and rows[0][-1] == "cautions" and len(rows) == 8
    assert (tmp_path / "start.notes.txt").read_text().startswith("Guardband starting design")
    # the written file reads back as a runs table with every run pending
    from guardband.planner.inputs.protocol import load_protocol
    from guardband.planner.inputs.runs import read_runs

    p = load_protocol(protocol)
    table = read_runs(out, p)
    assert table.pending.all()
    # values are written to 6 significant digits, so the check allows 1e-5
    assert p.design_space().contains(table.X, tol=1e-5).all()
    if p.start is not None:  # inside the starting region
        A, b, _ = p.start_rows()
        assert (table.X @ A.T <= b + 1e-9).all()


@pytest.fixture(scope="module")
def campaign(tmp_path_factory):
    out = tmp_path_factory.mktemp("campaign")
    res = run("plan", PROTOCOLS / "tablet_blend.toml", PROTOCOLS / "tablet_blend_runs.csv",
              "--out", out, "--count", 3, "--pool", 500)
    assert res.exit_code == 0, res.output
    return out, res


def test_start_with_a_region_outside_the_design_space_names_the_rule_and_writes_nothing(tmp_path):
    """The refusal named "starting region row 1"; `check` names the rule, and so does `start` now."""
    text = (PROTOCOLS / "dose_combination.toml").read_text()
    text = text.replace('rules = ["dose_a <= 10", "dose_b <= 2"]', 'rules = ["dose_a >= 100"]')
    protocol = tmp_path / "p.toml"
    protocol.write_text(text)
    res = runner.invoke(app, ["start", str(protocol), "--runs", "3", "--out", str(tmp_path / "s.csv")])
    assert res.exit_code == EXIT_PROTOCOL
    assert "start region: 'dose_a >= 100'" in res.stderr and "row 1" not in res.stderr
    assert not (tmp_path / "s.csv").exists()


def test_plan_writes_table_log_and_cautions(campaign):
    out, res = campaign
    assert "CAUTIONS" in res.stdout and "qualified person" in res.stdout
    plans = list(out.glob("plan-*.csv"))
    assert len(plans) == 1
    text = plans[0].read_text()
    assert "qualified person reviews every proposed run" in text  # the cautions column
    assert "CAUTIONS:" in (out / plans[0].name.replace(".csv", ".notes.txt")).read_text()
    rows = data_rows(text)
    assert rows[0][:3] == ["rank", "run_id", "active"] and len(rows) == 4
    assert {"p_degradant_b", "p_friability", "joint", "ei", "pi", "bound", "mean"} <= set(rows[0])
    assert len(list(out.glob("exclusions-*.csv"))) == 1
    assert run("verify", out / "decisions.jsonl").exit_code == 0


def test_plan_json_is_parseable_and_carries_cautions(tmp_path):
    res = run("plan", PROTOCOLS / "dose_combination.toml", PROTOCOLS / "dose_combination_runs.csv",
              "--out", tmp_path, "--format", "json", "--pool", 300)
    assert res.exit_code == 0, res.output
    data = json.loads(res.stdout)
    assert any("ethics committee" in c for c in data["cautions"])
    assert data["log"]["count"] == 1 and len(data["proposals"]) >= 1
    for prop in data["proposals"]:  # inside the starting region's neighbourhood and off the forbidden corner
        assert not (prop["x"]["dose_a"] >= 40 and prop["x"]["dose_b"] >= 8)


def test_tampered_log_fails_at_the_right_record(tmp_path):
    args = (PROTOCOLS / "tablet_blend.toml", PROTOCOLS / "tablet_blend_runs.csv", "--out", tmp_path, "--pool", 300, "--count", 1)
    assert run("plan", *args).exit_code == 0
    assert run("plan", *args, "--seed", 99).exit_code == 0
    log = tmp_path / "decisions.jsonl"
    ok = run("verify", log, "--format", "json")
    head = json.loads(ok.stdout)["head"]
    lines = log.read_text().splitlines()
    edited = lines[0].replace('"seed":20261201', '"seed":20261202')
    assert edited != lines[0]
    log.write_text("\n".join([edited, lines[1]]) + "\n")
    res = run("verify", log)
    assert res.exit_code == EXIT_VERIFY
    assert "record 0" in res.stderr
    # a cut log: the chain alone cannot show it, but the files of the cut
    # record are now named by no record, and verify names them
    log.write_text(lines[0] + "\n")
    res = run("verify", log)
    assert res.exit_code == EXIT_VERIFY and "is not named by any record" in res.stderr
    assert re.search(r"plan-[0-9a-f]{12}\.csv is not named", res.stderr)
    res = run("verify", log, "--expect-count", 2)
    assert res.exit_code == EXIT_VERIFY and "expected 2" in res.stderr
    assert run("verify", log, "--expect-head", head).exit_code == EXIT_VERIFY


def test_replay_is_identical(campaign):
    out, _ = campaign
    res = run("replay", out / "decisions.jsonl", "--record", 0)
    assert res.exit_code == 0, res.output
    assert res.stdout.startswith("identical")


def test_replay_detects_altered_input_copy(tmp_path, campaign):
    src, _ = campaign
    dst = tmp_path / "c"
    shutil.copytree(src, dst)
    copy = next((dst / "inputs").glob("runs-*.csv"))
    copy.write_text(copy.read_text().replace("R01", "R99"))
    res = run("replay", dst / "decisions.jsonl", "--record", 0)
    assert res.exit_code == EXIT_VERIFY
    assert "was altered" in res.stderr


def test_no_safe_candidate_exit_code(tmp_path):
    text = (PROTOCOLS / "tablet_blend.toml").read_text().replace("min_runs = 6", "min_runs = 40")
    p = tmp_path / "strict.toml"
    p.write_text(text)
    res = run("plan", p, PROTOCOLS / "tablet_blend_runs.csv", "--out", tmp_path / "o", "--pool", 200)
    assert res.exit_code == EXIT_NO_SAFE
    assert "no candidate passed the safety screen" in res.stderr
    # the decision is still recorded, with its reason
    assert run("verify", tmp_path / "o" / "decisions.jsonl").exit_code == 0


def test_drawn_seed_is_printed_and_recorded(tmp_path):
    text = (PROTOCOLS / "tablet_blend.toml").read_text().replace("seed = 20261201", "")
    p = tmp_path / "noseed.toml"
    p.write_text(text)
    res = run("plan", p, PROTOCOLS / "tablet_blend_runs.csv", "--out", tmp_path / "o", "--pool", 200, "--format", "json")
    assert res.exit_code == 0, res.output
    m = re.search(r"seed used: (\d+) \(drawn; recorded in the log\)", res.stderr)
    assert m
    assert json.loads(res.stdout)["seed"] == int(m.group(1))


def test_runs_error_exit_code(tmp_path):
    bad = tmp_path / "runs.csv"
    bad.write_text((PROTOCOLS / "tablet_blend_runs.csv").read_text().replace("R03,0.1", "R03,zero"))
    res = run("plan", PROTOCOLS / "tablet_blend.toml", bad, "--out", tmp_path / "o")
    assert res.exit_code == 4
    assert "row 4 (run R03), column active: 'zero' is not a number" in res.stderr
    assert not (tmp_path / "o").exists()  # nothing written


def test_demo_runs_everything(tmp_path):
    res = run("demo", "--out", tmp_path / "demo")
    assert res.exit_code == 0, res.output
    summary = (tmp_path / "demo" / "SUMMARY.txt").read_text()
    assert "== 4. replay" in summary and "identical" in summary
    assert "ok: 1 record(s)" in summary
    assert "CAUTIONS" in summary


def test_a_plan_of_another_study_into_a_campaign_folder_is_warned_of(tmp_path):
    """Two studies in one decision log went without a word; a protocol amendment (same responses)
    is a campaign's own and goes on quietly."""
    out = tmp_path / "camp"
    res = run("plan", PROTOCOLS / "tablet_blend.toml", PROTOCOLS / "tablet_blend_runs.csv", "--out", out,
              "--pool", 300, "--count", 1)
    assert res.exit_code == 0 and "another study" not in res.stderr
    res = run("plan", PROTOCOLS / "tablet_blend.toml", PROTOCOLS / "tablet_blend_runs.csv", "--out", out,
              "--pool", 300, "--count", 2)
    assert res.exit_code == 0 and "another study" not in res.stderr
    res = run("plan", PROTOCOLS / "dose_combination.toml", PROTOCOLS / "dose_combination_runs.csv", "--out", out)
    assert res.exit_code == 0, res.output
    said = " ".join(res.stderr.split())
    assert ("warning: the campaign folder's last plan (record 1, protocol file tablet_blend.toml) is of another "
            "study: it modelled dissolution_30min, degradant_b, friability; this protocol models "
            "response_score, dlt_rate") in said


def test_a_last_plan_that_recorded_no_models_is_not_taken_for_another_study(tmp_path):
    from guardband.planner.app.workflow import other_study_warning
    from guardband.planner.inputs.protocol import load_protocol
    from guardband.safety import ledger

    log = tmp_path / "decisions.jsonl"
    ledger.append_record(log, "plan", {"models": [], "protocol_file": {"name": "x.toml"}})
    assert other_study_warning(ledger.read_records(log), load_protocol(PROTOCOLS / "tablet_blend.toml")) == []
    ledger.append_record(log, "plan", {"models": [{"response": "y"}], "protocol_file": {"name": "x.toml"}})
    assert "is of another study" in other_study_warning(ledger.read_records(log), load_protocol(PROTOCOLS / "tablet_blend.toml"))[0]
