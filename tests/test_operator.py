"""Who recorded each step, corrections appended by ``supersede``, and an empty log.

- Every plan record carries an operator and where the name came from:
  ``--by``, else ``GUARDBAND_OPERATOR``, else the login name.
- ``guardband supersede`` appends a correction naming the record, why and
  by whom; ``verify --summary`` and the report show it; refusals write
  nothing.
- An empty log fails ``verify`` unless ``--accept-empty`` is given.
"""

from __future__ import annotations

import json
import shutil

import pytest
from typer.testing import CliRunner

from guardband.planner.cli import app
from guardband.planner.errors import EXIT_USAGE, EXIT_VERIFY
from guardband.safety import ledger

from test_campaign_files import FAST, PROTOCOL, RUNS, snapshot

runner = CliRunner()


def run(*args, env=None):
    return runner.invoke(app, [str(a) for a in args], catch_exceptions=False, env=env)


@pytest.fixture(scope="module")
def made(tmp_path_factory):
    folder = tmp_path_factory.mktemp("op") / "campaign"
    res = run("plan", PROTOCOL, RUNS, "--out", folder, *FAST, "--by", "  A. Chemist ")
    assert res.exit_code == 0, res.output
    return folder


@pytest.fixture
def campaign(made, tmp_path):
    folder = tmp_path / "campaign"
    shutil.copytree(made, folder)
    return folder


def operator_of(folder, index=0):
    return ledger.read_records(folder / "decisions.jsonl")[index]["body"]["operator"]


def test_by_is_recorded_with_its_source(made):
    assert operator_of(made) == {"name": "A. Chemist", "source": "--by"}


def test_the_environment_then_the_login_name(campaign, monkeypatch):
    monkeypatch.setenv("GUARDBAND_OPERATOR", "B. Analyst")
    assert run("plan", PROTOCOL, RUNS, "--out", campaign, *FAST, "--seed", 3).exit_code == 0
    assert operator_of(campaign, 1) == {"name": "B. Analyst", "source": "environment GUARDBAND_OPERATOR"}
    monkeypatch.delenv("GUARDBAND_OPERATOR")
    monkeypatch.setattr("getpass.getuser", lambda: "clogin")
    assert run("plan", PROTOCOL, RUNS, "--out", campaign, *FAST, "--seed", 4).exit_code == 0
    assert operator_of(campaign, 2) == {"name": "clogin", "source": "login name"}


@pytest.mark.parametrize("by, words", [
    ("", "--by (the operator's name) is empty"),
    ("   ", "--by (the operator's name) is empty"),
    ("A\x1b[2JB", "control or invisible character (U+001B)"),
    ("A\u200dB", "control or invisible character (U+200D)"),
    ("x" * 201, "at most 200 are accepted"),
])
def test_an_unusable_operator_name_is_refused_before_anything_is_written(campaign, by, words):
    before = snapshot(campaign)
    res = run("plan", PROTOCOL, RUNS, "--out", campaign, *FAST, "--seed", 5, "--by", by)
    assert res.exit_code == EXIT_USAGE
    assert words in res.stderr
    assert snapshot(campaign) == before


def test_no_name_at_all_is_refused(campaign, monkeypatch):
    monkeypatch.delenv("GUARDBAND_OPERATOR", raising=False)

    def nobody():
        raise OSError("no login name")

    monkeypatch.setattr("getpass.getuser", nobody)
    before = snapshot(campaign)
    res = run("plan", PROTOCOL, RUNS, "--out", campaign, *FAST, "--seed", 5)
    assert res.exit_code == EXIT_USAGE and "give --by NAME or set GUARDBAND_OPERATOR" in res.stderr
    assert snapshot(campaign) == before


# -------------------------------------------------------------------- supersede
def test_supersede_appends_a_correction_that_verify_and_the_summary_show(campaign):
    log = campaign / "decisions.jsonl"
    first = ledger.read_records(log)[0]
    res = run("supersede", log, "--record", 0, "--reason", "runs file had run S03's force in N, not kN",
              "--by", "QA Reviewer")
    assert res.exit_code == 0, res.output
    assert "record 1 supersedes record 0" in res.stdout and "by QA Reviewer, from --by" in res.stdout
    records = ledger.read_records(log)
    assert records[0] == first  # nothing is erased or changed
    body = records[1]["body"]
    assert records[1]["kind"] == "correction"
    assert body["supersedes"] == 0 and body["supersedes_hash"] == first["hash"]
    assert body["operator"] == {"name": "QA Reviewer", "source": "--by"}
    assert body["supersedes_label"] == first["body"]["step_label"]
    assert run("verify", log, "--expect-count", 2).exit_code == 0
    summary = run("verify", log, "--summary")
    assert summary.exit_code == 0
    text = " ".join(summary.stdout.split())  # the table format wraps long lines at 100 columns
    assert "by: A. Chemist (--by)" in text
    assert "[SUPERSEDED by record 1: runs file had run S03's force in N, not kN]" in text
    assert "record 1 (correction" in text and "by QA Reviewer (--by)) supersedes record 0" in text
    data = json.loads(run("verify", log, "--summary", "--format", "json").stdout)
    assert data["corrections"][0]["operator"] == "QA Reviewer (--by)"
    assert data["steps"][0]["superseded_by"] == 1


def test_the_report_names_who_superseded_the_step(campaign):
    from guardband.planner.report.folder import _supersession

    log = campaign / "decisions.jsonl"
    assert run("supersede", log, "-r", 0, "--reason", "wrong batch of lactose", "--by", "QA").exit_code == 0
    text = _supersession(ledger.read_records(log))[0]
    assert text == "This planning step was superseded by record 1 (correction, by QA (--by)): wrong batch of lactose"


@pytest.mark.parametrize("args, code, words", [
    (("-r", 5, "--reason", "x"), EXIT_VERIFY, "there is no record 5 to supersede: the log has 1 record(s) (0 to 0)"),
    (("-r", 0, "--reason", "  "), EXIT_USAGE, "--reason is empty"),
    (("-r", 0, "--reason", "bad\x07bell"), EXIT_USAGE, "--reason holds a control or invisible character (U+0007)"),
    (("-r", 0, "--reason", "ok", "--by", ""), EXIT_USAGE, "--by (the operator's name) is empty"),
])
def test_supersede_refusals_write_nothing(campaign, args, code, words):
    before = snapshot(campaign)
    res = run("supersede", campaign / "decisions.jsonl", *args)
    assert res.exit_code == code
    assert words in res.stderr
    assert snapshot(campaign) == before


def test_supersede_refuses_a_campaign_whose_files_fail(campaign):
    plan = next(campaign.glob("plan-*.csv"))
    plan.write_text("edited\n")
    before = snapshot(campaign)
    res = run("supersede", campaign / "decisions.jsonl", "-r", 0, "--reason", "x", "--by", "QA")
    assert res.exit_code == EXIT_VERIFY and plan.name in res.stderr and "nothing was appended" in res.stderr
    assert snapshot(campaign) == before


# -------------------------------------------------------------------- empty log
def test_an_empty_log_fails_unless_accepted(tmp_path):
    log = tmp_path / "decisions.jsonl"
    log.write_bytes(b"")
    res = run("verify", log)
    assert res.exit_code == EXIT_VERIFY
    assert "holds no record" in res.stderr and "--accept-empty" in res.stderr
    ok = run("verify", log, "--accept-empty")
    assert ok.exit_code == 0 and ok.stdout.startswith("ok: 0 records")
    assert log.read_bytes() == b""


def test_a_missing_log_fails(tmp_path):
    res = run("verify", tmp_path / "decisions.jsonl", "--accept-empty")
    assert res.exit_code == EXIT_VERIFY and "cannot be read" in res.stderr
