"""Outputs go only to a new path or a writable regular file; every refusal is named and changes nothing.

A symbolic link is never followed or replaced (for a log, a table or a
design), device nodes, FIFOs and folders are refused, a write-protected log
is not rewritten, an empty ``--out`` is a usage error, and ``demo --out``
onto a file and a lock path that is a folder are named refusals (exit 8),
not internal errors.
"""

from __future__ import annotations

import os
import shutil
import stat
from pathlib import Path

import pytest
from typer.testing import CliRunner

from guardband.planner.cli import app
from guardband.planner.errors import EXIT_IO, EXIT_USAGE, EXIT_VERIFY, OutputError

from test_campaign_files import FAST, PROTOCOL, RUNS, snapshot

runner = CliRunner()


def run(*args):
    return runner.invoke(app, [str(a) for a in args], catch_exceptions=False)


def _start(out):
    return run("start", PROTOCOL, "--runs", 3, "--out", out)


# ------------------------------------------------------------------ start --out
def test_start_refuses_a_symlink_and_leaves_it_and_its_target(tmp_path):
    target = tmp_path / "target.csv"
    target.write_text("keep me\n")
    os.chmod(target, 0o600)
    link = tmp_path / "design.csv"
    os.symlink(target, link)
    before = snapshot(tmp_path)
    res = _start(link)
    assert res.exit_code == EXIT_IO
    assert f"{link} is a symbolic link" in res.stderr
    assert snapshot(tmp_path) == before and stat.S_IMODE(target.stat().st_mode) == 0o600


def test_start_refuses_a_dangling_symlink(tmp_path):
    link = tmp_path / "design.csv"
    os.symlink(tmp_path / "nowhere.csv", link)
    res = _start(link)
    assert res.exit_code == EXIT_IO and "is a symbolic link" in res.stderr
    assert not (tmp_path / "nowhere.csv").exists() and link.is_symlink()


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs FIFOs")
def test_start_refuses_a_fifo(tmp_path):
    fifo = tmp_path / "design.csv"
    os.mkfifo(fifo)
    res = _start(fifo)
    assert res.exit_code == EXIT_IO
    assert f"{fifo} is a FIFO (named pipe), not a regular file" in res.stderr
    assert stat.S_ISFIFO(os.lstat(fifo).st_mode)


@pytest.mark.skipif(not os.path.exists("/dev/null"), reason="needs /dev/null")
def test_start_refuses_a_device_node():
    res = _start("/dev/null")
    assert res.exit_code == EXIT_IO
    assert "/dev/null is a character device, not a regular file" in res.stderr
    assert stat.S_ISCHR(os.lstat("/dev/null").st_mode)


def test_start_refuses_a_folder(tmp_path):
    res = _start(tmp_path)
    assert res.exit_code == EXIT_IO and "is a folder, not a regular file" in res.stderr


def test_start_refuses_a_write_protected_file(tmp_path):
    out = tmp_path / "design.csv"
    out.write_text("signed copy\n")
    os.chmod(out, 0o444)
    res = run("start", PROTOCOL, "--runs", 3, "--out", out, "--replace")
    assert res.exit_code == EXIT_IO and f"{out} is write-protected" in res.stderr
    assert out.read_text() == "signed copy\n"


def test_start_still_replaces_a_writable_regular_file_when_asked(tmp_path):
    out = tmp_path / "design.csv"
    out.write_text("old\n")
    assert run("start", PROTOCOL, "--runs", 3, "--out", out, "--replace").exit_code == 0
    assert out.read_text().startswith("run_id,")
    assert (tmp_path / "design.notes.txt").read_text().startswith("Guardband starting design")


@pytest.mark.parametrize("command", [
    ("start", PROTOCOL, "--runs", 3),
    ("plan", PROTOCOL, RUNS, *FAST),
    ("demo",),
    ("simulate", "-", "--problem", "gramacy", "--seeds", 1, "--budget", 1),
])
@pytest.mark.parametrize("empty", ["", "  "])
def test_an_empty_out_is_a_usage_error(tmp_path, monkeypatch, command, empty):
    monkeypatch.chdir(tmp_path)
    res = run(*command, "--out", empty)
    assert res.exit_code == EXIT_USAGE
    assert "--out" in res.output and "is empty" in res.output
    assert list(tmp_path.iterdir()) == []


# -------------------------------------------------------------------- demo, plan
def test_demo_onto_an_existing_file_is_a_named_refusal(tmp_path):
    out = tmp_path / "demo.txt"
    out.write_text("mine\n")
    res = run("demo", "--out", out)
    assert res.exit_code == EXIT_IO
    assert f"{out} exists and is not a folder" in res.stderr
    assert out.read_text() == "mine\n" and sorted(p.name for p in tmp_path.iterdir()) == ["demo.txt"]


@pytest.fixture
def campaign(tmp_path) -> Path:
    folder = tmp_path / "campaign"
    assert run("plan", PROTOCOL, RUNS, "--out", folder, *FAST).exit_code == 0
    return folder


def test_a_write_protected_log_refuses_and_nothing_is_written(campaign):
    log = campaign / "decisions.jsonl"
    os.chmod(log, 0o444)
    before = snapshot(campaign)
    res = run("plan", PROTOCOL, RUNS, "--out", campaign, *FAST, "--seed", 5)
    assert res.exit_code == EXIT_IO
    assert f"{log} is write-protected" in res.stderr
    assert snapshot(campaign) == before


def test_a_symlinked_log_is_refused_not_followed(campaign, tmp_path):
    log = campaign / "decisions.jsonl"
    real = tmp_path / "real.jsonl"
    shutil.move(log, real)
    os.symlink(real, log)
    before, real_bytes = snapshot(campaign), real.read_bytes()
    res = run("plan", PROTOCOL, RUNS, "--out", campaign, *FAST, "--seed", 5)
    assert res.exit_code == EXIT_IO
    assert f"{log} is a symbolic link" in res.stderr
    assert snapshot(campaign) == before and real.read_bytes() == real_bytes


def test_a_lock_path_that_is_a_folder_is_a_named_refusal(campaign):
    lock = campaign / "decisions.jsonl.lock"
    lock.unlink()
    lock.mkdir()
    before = snapshot(campaign)
    res = run("plan", PROTOCOL, RUNS, "--out", campaign, *FAST, "--seed", 5)
    assert res.exit_code == EXIT_IO
    assert "the lock file of the decision log is refused" in res.stderr and "is a folder" in res.stderr
    assert snapshot(campaign) == before


def test_a_table_path_taken_by_a_link_refuses_the_whole_step(campaign, monkeypatch):
    """A step whose plan table would land on a link writes nothing and appends nothing."""
    from guardband.planner.app import workflow

    real_render = workflow.render_tables
    names = {}

    def render(*args, **kwargs):
        tables = real_render(*args, **kwargs)
        names["plan"] = workflow.table_file_names("plan", tables.plan, tables.plan_notes)[0]
        os.symlink("/dev/null", campaign / names["plan"])
        return tables

    monkeypatch.setattr(workflow, "render_tables", render)
    before_log = (campaign / "decisions.jsonl").read_bytes()
    res = run("plan", PROTOCOL, RUNS, "--out", campaign, *FAST, "--seed", 6)
    # the folder check under the lock sees the link first: a step-like file no record names
    assert res.exit_code == EXIT_VERIFY
    assert f"{names['plan']} is not named by any record" in res.stderr
    assert (campaign / "decisions.jsonl").read_bytes() == before_log
    assert (campaign / names["plan"]).is_symlink()
    assert not [p for p in campaign.rglob(".*") if p.name.endswith(".tmp")]


def test_check_output_target_is_the_one_home_for_the_rule(tmp_path):
    from guardband.planner.app.fileio import atomic_write_many

    link = tmp_path / "b.csv"
    os.symlink(tmp_path / "x", link)
    with pytest.raises(OutputError, match="b.csv is a symbolic link"):
        atomic_write_many({tmp_path / "a.csv": b"1", link: b"2"})
    assert not (tmp_path / "a.csv").exists()


def test_write_protected_input_copies_with_the_same_bytes_are_left_alone(campaign):
    """A second step on the same inputs names the same copies; protecting them does not block it."""
    for copy in (campaign / "inputs").iterdir():
        os.chmod(copy, 0o444)
    before = {p.name: p.read_bytes() for p in (campaign / "inputs").iterdir()}
    res = run("plan", PROTOCOL, RUNS, "--out", campaign, *FAST, "--seed", 7)
    assert res.exit_code == 0, res.output
    assert {p.name: p.read_bytes() for p in (campaign / "inputs").iterdir()} == before
    assert all(stat.S_IMODE(p.stat().st_mode) == 0o444 for p in (campaign / "inputs").iterdir())
    assert run("verify", campaign / "decisions.jsonl", "--expect-count", 2).exit_code == 0


def test_start_never_overwrites_a_file_that_may_hold_measurements(tmp_path):
    """A starting design written over the lab's runs file would lose its measurements: refused
    (exit 8, nothing changed) unless --replace says so."""
    out = tmp_path / "runs.csv"
    shutil.copy(RUNS, out)
    before = snapshot(tmp_path)
    res = _start(out)
    assert res.exit_code == EXIT_IO
    assert f"{out} already exists" in res.stderr and "--replace" in res.stderr
    assert snapshot(tmp_path) == before
    res = run("start", PROTOCOL, "--runs", 3, "--out", out, "--replace")
    assert res.exit_code == 0 and out.read_text() != RUNS.read_text()


def test_start_writes_onto_an_empty_file(tmp_path):
    out = tmp_path / "design.csv"
    out.write_text("")
    assert _start(out).exit_code == 0 and out.read_text().strip()
