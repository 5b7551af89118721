"""The reviewer's summary of a decision log (``guardband verify LOG --summary``)."""

from __future__ import annotations

import csv
import io
import json
import tomllib
from pathlib import Path

import pytest
from typer.testing import CliRunner

from guardband.planner.cli import app
from guardband.planner.app.review import summarize_log
from guardband.planner.app.workflow import LOG_NAME, run_plan
from guardband.safety import ledger
from guardband.safety.screen import REASONS

from conftest import PROTOCOLS

runner = CliRunner()
REASON_TEXT = "the second plan used a runs file with R04 entered twice"


def _exclusion_counts(path: Path) -> dict[str, int]:
    """Candidates per outcome, read from the exclusion table the plan wrote (an independent path)."""
    lines = [line for line in path.read_text(encoding="utf-8").splitlines() if not line.startswith("#")]
    counts = {"survived": 0, **{r: 0 for r in REASONS}}
    for row in csv.DictReader(io.StringIO("\n".join(lines))):
        counts["survived" if row["status"] == "survived" else row["reason"]] += 1
    return counts


@pytest.fixture(scope="module")
def campaign(tmp_path_factory):
    """Two planning steps in one folder (both example protocols) and a correction of the first."""
    out = tmp_path_factory.mktemp("campaign")
    first = run_plan(PROTOCOLS / "dose_combination.toml", PROTOCOLS / "dose_combination_runs.csv", out,
                     pool_size=300, count=1)
    second = run_plan(PROTOCOLS / "tablet_blend.toml", PROTOCOLS / "tablet_blend_runs.csv", out,
                      pool_size=300, count=1)
    ledger.append_record(out / LOG_NAME, "correction", {"replaced_by": second.record["index"]},
                         supersedes=first.record["index"], reason=REASON_TEXT)
    return out, [first, second]


def _toml(name: str) -> dict:
    with (PROTOCOLS / name).open("rb") as fh:
        return tomllib.load(fh)["study"]


def test_summary_lists_both_steps_counts_and_the_correction(campaign):
    out, outcomes = campaign
    summary = summarize_log(out / LOG_NAME)
    assert summary.count == 3
    assert summary.head == ledger.head_and_count(out / LOG_NAME)[0]
    assert [s.index for s in summary.steps] == [0, 1]
    for step, outcome, toml_name in zip(summary.steps, outcomes, ["dose_combination.toml", "tablet_blend.toml"]):
        body = outcome.record["body"]
        assert step.step_label == body["step_label"]
        assert step.time == outcome.record["time"]
        # who and which inputs: read here from the protocol file itself, not through the planner
        study = _toml(toml_name)
        assert (step.protocol["title"], step.protocol["author"], step.protocol["version"]) == (
            study["title"], study["author"], study["version"])
        assert step.protocol_file["name"] == toml_name
        assert step.protocol_file["sha256"] == body["protocol_file"]["sha256"]
        assert step.runs_file["sha256"] == body["runs_file"]["sha256"]
        # counts as in the exclusion table the plan wrote
        assert step.counts == _exclusion_counts(out / body["exclusion_table"]["file"])
        assert [d["candidate"] for d in step.near_misses] == [d["candidate"] for d in body["near_misses"]]
    assert summary.steps[0].superseded_by == 2 and summary.steps[0].superseded_reason == REASON_TEXT
    assert summary.steps[1].superseded_by is None
    (corr,) = summary.corrections
    assert (corr.index, corr.supersedes, corr.supersedes_kind, corr.reason) == (2, 0, "plan", REASON_TEXT)
    assert corr.supersedes_label == outcomes[0].record["body"]["step_label"]
    # the dose study's stronger cautions travel with the summary
    assert any("ethics committee" in c for c in summary.cautions)


def test_verify_summary_table(campaign):
    out, outcomes = campaign
    result = runner.invoke(app, ["verify", str(out / LOG_NAME), "--summary"])
    assert result.exit_code == 0, result.output
    text = " ".join(result.stdout.split())  # the table format wraps long lines at 100 columns
    for outcome in outcomes:
        body = outcome.record["body"]
        assert f"Step {body['step_label']} (record {outcome.record['index']}" in text
        assert f"survived {body['counts']['survived']}" in text
        assert body["runs_file"]["sha256"] in text
        for miss in body["near_misses"][:1]:
            assert str(miss["candidate"]) in text
    assert f"SUPERSEDED by record 2: {REASON_TEXT}" in text
    assert f"record 2 (correction" in text and f"supersedes record 0 (plan {outcomes[0].record['body']['step_label']})" in text
    assert "CAUTIONS:" in text


def test_verify_summary_csv_and_json(campaign):
    out, outcomes = campaign
    result = runner.invoke(app, ["verify", str(out / LOG_NAME), "--summary", "--format", "csv"])
    assert result.exit_code == 0, result.output
    lines = [line for line in result.stdout.splitlines() if not line.startswith("#")]
    rows = list(csv.DictReader(io.StringIO("\n".join(lines))))
    assert [(r["index"], r["kind"]) for r in rows] == [("0", "plan"), ("1", "plan"), ("2", "correction")]
    for row, outcome in zip(rows, outcomes):
        counts = outcome.record["body"]["counts"]
        assert {k: int(row[k]) for k in counts} == counts
        assert int(row["n_near_misses"]) == len(outcome.record["body"]["near_misses"])
    assert rows[0]["status"] == "superseded by record 2" and rows[1]["status"] == "in force"
    assert rows[2]["supersedes"] == "0" and rows[2]["reason"] == REASON_TEXT

    result = runner.invoke(app, ["verify", str(out / LOG_NAME), "--summary", "--format", "json"])
    assert result.exit_code == 0, result.output
    data = json.loads(result.stdout)
    assert data["verified"] is True and data["count"] == 3
    assert [s["step_label"] for s in data["steps"]] == [o.record["body"]["step_label"] for o in outcomes]
    assert data["corrections"][0]["reason"] == REASON_TEXT


def test_summary_refuses_an_altered_log(campaign, tmp_path):
    out, _ = campaign
    log = tmp_path / LOG_NAME
    lines = (out / LOG_NAME).read_text(encoding="utf-8").splitlines(keepends=True)
    lines[1] = lines[1].replace('"seed":', '"seed":1', 1)  # a changed seed breaks the record's hash
    log.write_text("".join(lines), encoding="utf-8")
    result = runner.invoke(app, ["verify", str(log), "--summary"])
    assert result.exit_code == 5
    assert "Step " not in result.stdout
    assert "failed verification" in result.stderr


def test_summary_names_a_missing_protocol_copy(campaign, tmp_path):
    out, outcomes = campaign
    log = tmp_path / LOG_NAME
    log.write_bytes((out / LOG_NAME).read_bytes())  # the copies under inputs/ are not there
    summary = summarize_log(log)
    assert all("is missing" in s.protocol["problem"] for s in summary.steps)
    assert "is missing" in summary.render("table")
