"""Every file a record names is checked by verify, and no step leaves files the log does not name.

- Each kind of campaign file (plan table, exclusion table, protocol copy,
  runs copy) edited, deleted, or added without a record: ``verify`` fails
  (exit 5) and names the file; it writes nothing.
- ``replay`` reads input copies only from the campaign's ``inputs/``
  folder: a self-consistent forged log naming ``..``, an absolute path, a
  link to ``/dev/zero`` or a FIFO is refused at once, naming the field.
- A fault between writing the tables and appending the record, and real
  SIGKILLs at every file operation of the write, leave either a logged
  step with all its files or no trace (after the next writer settles
  what a kill between the append and the renames left).
"""

from __future__ import annotations

import json
import os
import random
import re
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import pytest
from typer.testing import CliRunner

from guardband.planner.cli import app
from guardband.planner.errors import EXIT_IO, EXIT_VERIFY

ROOT = Path(__file__).resolve().parents[1]
HERE = Path(__file__).resolve().parent / "bad_inputs"
PROTOCOL = HERE / "good_blend.toml"
RUNS = HERE / "good_blend_runs.csv"
FAST = ("--pool", "50", "--count", "1")
N_KILL_TRIALS = 24

runner = CliRunner()


def run(*args, env=None):
    return runner.invoke(app, [str(a) for a in args], catch_exceptions=False, env=env)


def snapshot(folder: Path) -> dict:
    """Every entry under ``folder`` with its bytes (links and other entries by what they are)."""
    out = {}
    for path in sorted(folder.rglob("*")):
        rel = path.relative_to(folder).as_posix()
        if path.is_symlink():
            out[rel] = ("link", os.readlink(path))
        elif path.is_file():
            out[rel] = path.read_bytes()
        elif path.is_dir():
            out[rel] = "dir"
        else:
            out[rel] = "special"
    return out


@pytest.fixture(scope="module")
def made(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("made") / "campaign"
    res = run("plan", PROTOCOL, RUNS, "--out", folder, *FAST, "--by", "tests")
    assert res.exit_code == 0, res.output
    return folder


@pytest.fixture
def campaign(made, tmp_path) -> Path:
    folder = tmp_path / "campaign"
    shutil.copytree(made, folder)
    return folder


def named(folder: Path) -> dict[str, str]:
    body = json.loads((folder / "decisions.jsonl").read_text().splitlines()[0])["body"]
    return {"plan_table": body["plan_table"]["file"], "exclusion_table": body["exclusion_table"]["file"],
            "protocol_file": body["protocol_file"]["copy"], "runs_file": body["runs_file"]["copy"]}


KINDS = ("plan_table", "exclusion_table", "protocol_file", "runs_file")


def verify_fails_naming(folder: Path, name: str, words: str):
    before = snapshot(folder)
    res = run("verify", folder / "decisions.jsonl")
    assert res.exit_code == EXIT_VERIFY, res.output
    assert name in res.stderr and words in res.stderr, res.stderr
    assert snapshot(folder) == before  # verify writes nothing
    return res


def test_an_untouched_campaign_verifies_with_every_file_checked(campaign):
    res = run("verify", campaign / "decisions.jsonl")
    assert res.exit_code == 0, res.output
    assert "6 named files match their SHA-256" in res.stdout  # two tables, their notes, two input copies


@pytest.mark.parametrize("kind", KINDS)
def test_an_edited_file_is_named(campaign, kind):
    rel = named(campaign)[kind]
    with open(campaign / rel, "ab") as handle:
        handle.write(b"\n")
    verify_fails_naming(campaign, rel, f"(record 0, {kind}) was altered")


@pytest.mark.parametrize("kind", KINDS)
def test_a_deleted_file_is_named(campaign, kind):
    rel = named(campaign)[kind]
    (campaign / rel).unlink()
    verify_fails_naming(campaign, rel, f"(record 0, {kind}) is missing")


@pytest.mark.parametrize("rel", ["plan-0123456789ab.csv", "exclusions-0123456789ab.csv",
                                 "inputs/protocol-0123456789ab.toml", "inputs/runs-0123456789ab.csv"])
def test_an_added_step_file_is_named(campaign, rel):
    kind = named(campaign)
    source = {"plan": "plan_table", "exclusions": "exclusion_table", "inputs/protocol": "protocol_file",
              "inputs/runs": "runs_file"}[rel.rsplit("-", 1)[0]]
    shutil.copyfile(campaign / kind[source], campaign / rel)  # looks exactly like a logged one
    verify_fails_naming(campaign, rel, "is not named by any record")


def test_a_linked_file_in_place_of_a_named_one_is_refused(campaign):
    rel = named(campaign)["plan_table"]
    real = campaign.parent / "elsewhere.csv"
    shutil.move(campaign / rel, real)
    os.symlink(real, campaign / rel)  # same bytes, but not a regular file in the folder
    verify_fails_naming(campaign, rel, "is not a regular file")


def test_other_unnamed_files_are_reported_but_do_not_fail(campaign):
    (campaign / "notes.txt").write_text("lab notes\n")
    (campaign / "report-P000000.html").write_text("<html></html>\n")
    res = run("verify", campaign / "decisions.jsonl")
    assert res.exit_code == 0, res.output
    assert "note: notes.txt is not named by any record" in res.stderr
    assert "1 report file(s)" in res.stderr


def test_replay_refuses_an_edited_plan_table(campaign):
    """It used to say "identical": the re-run matched the record, not the file on disk."""
    rel = named(campaign)["plan_table"]
    path = campaign / rel
    text = path.read_text()
    assert "\n1,P" in text
    path.write_text(text.replace("\n1,P", "\n2,P", 1))  # the rank of the first proposal
    res = run("replay", campaign / "decisions.jsonl", "--record", 0)
    assert res.exit_code == EXIT_VERIFY
    assert rel in res.stderr and "altered" in res.stderr
    assert "identical" not in res.stdout


# ------------------------------------------------------------- replay paths
def forge(folder: Path, key: str, copy: str) -> None:
    """Rewrite record 0 with another input copy path, as a self-consistent log."""
    from guardband.safety import ledger

    log = folder / "decisions.jsonl"
    rec = ledger.read_records(log)[0]
    body = dict(rec["body"])
    body[key] = dict(body[key], copy=copy)
    log.unlink()
    ledger.append_record(log, rec["kind"], body, time=rec["time"])
    assert ledger.verify(log).ok


@pytest.mark.parametrize("copy", ["../outside.toml", "/dev/zero", "inputs/../../outside.toml",
                                  "inputs/./x.toml", "", "inputs\\x.toml"])
def test_replay_refuses_a_copy_path_outside_inputs(campaign, copy):
    (campaign.parent / "outside.toml").write_bytes(b"x")
    forge(campaign, "protocol_file", copy)
    before = snapshot(campaign)
    res = run("replay", campaign / "decisions.jsonl", "--record", 0)
    assert res.exit_code == EXIT_VERIFY
    assert "protocol_file.copy" in res.stderr, res.stderr
    assert snapshot(campaign) == before


def test_replay_refuses_a_link_to_a_device_without_reading_it(campaign):
    os.symlink("/dev/zero", campaign / "inputs" / "protocol-zero.toml")
    forge(campaign, "protocol_file", "inputs/protocol-zero.toml")
    res = run("replay", campaign / "decisions.jsonl", "--record", 0)
    assert res.exit_code == EXIT_VERIFY
    assert "inputs/protocol-zero.toml" in res.stderr and "not a regular file" in res.stderr


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs FIFOs")
def test_replay_refuses_a_fifo_without_blocking(campaign):
    os.mkfifo(campaign / "inputs" / "runs-fifo.csv")
    forge(campaign, "runs_file", "inputs/runs-fifo.csv")
    res = run("replay", campaign / "decisions.jsonl", "--record", 0)
    assert res.exit_code == EXIT_VERIFY
    assert "inputs/runs-fifo.csv" in res.stderr and "not a regular file" in res.stderr


def test_an_input_copy_over_the_size_limit_is_refused_before_it_is_read(campaign, monkeypatch):
    from guardband.planner.app import campaign as campaign_module
    from guardband.planner.app.workflow import rerun_record
    from guardband.planner.errors import VerificationError

    monkeypatch.setattr(campaign_module, "CAMPAIGN_FILE_MAX_BYTES", 100)
    with pytest.raises(VerificationError, match=r"record 0 protocol_file: the input copy inputs/protocol-"
                                                r"[0-9a-f]{12}\.toml is refused: it holds \d+ bytes, more "
                                                r"than the input copy limit of 100"):
        rerun_record(campaign / "decisions.jsonl", 0)


# --------------------------------------------------------- faults in writing
def test_a_fault_between_the_tables_and_the_record_leaves_no_trace(campaign, monkeypatch):
    from guardband.planner.app import campaign as campaign_module
    from guardband.planner.app.workflow import run_plan

    real = campaign_module.commit_step
    stages = []

    def failing(*args, **kwargs):
        def fault(stage):
            stages.append(stage)
            if stage == "staged":
                # the tables are written (under pending names) at this moment
                assert any(p.name.endswith(".pending.tmp") for p in campaign.rglob(".*"))
                raise OSError(28, "No space left on device")
        return real(*args, fault=fault, **kwargs)

    monkeypatch.setattr("guardband.planner.app.workflow.commit_step", failing)
    before = snapshot(campaign)
    with pytest.raises(OSError, match="No space left"):
        run_plan(PROTOCOL, RUNS, campaign, seed=77, pool_size=50, count=1, by="tests")
    assert stages == ["staged"]
    assert snapshot(campaign) == before


def test_a_refused_lock_leaves_no_trace(campaign, monkeypatch):
    from guardband.planner.errors import OutputError
    from guardband.safety import ledger

    def refused(path, timeout=ledger.LOCK_TIMEOUT):
        raise OutputError(f"could not lock {path}.lock within 0 s")

    monkeypatch.setattr(ledger, "locked", refused)
    before = snapshot(campaign)
    res = run("plan", PROTOCOL, RUNS, "--out", campaign, *FAST, "--seed", 78)
    assert res.exit_code == EXIT_IO and "could not lock" in res.stderr
    assert snapshot(campaign) == before


def test_a_plan_refused_into_a_new_folder_leaves_no_folder(tmp_path, monkeypatch):
    from guardband.planner.app import campaign as campaign_module

    def full(*args, **kwargs):
        raise campaign_module.OutputError("could not write: No space left on device")

    monkeypatch.setattr("guardband.planner.app.workflow.commit_step", full)
    res = run("plan", PROTOCOL, RUNS, "--out", tmp_path / "new", *FAST)
    assert res.exit_code == EXIT_IO
    assert not (tmp_path / "new").exists()


def test_a_step_interrupted_after_its_record_is_put_in_place_by_the_next_writer(campaign, monkeypatch):
    from guardband.planner.app import campaign as campaign_module
    from guardband.planner.app.workflow import run_plan

    real = campaign_module.commit_step

    class Killed(BaseException):
        pass

    def interrupted(*args, **kwargs):
        def fault(stage):
            if stage == "appended":
                raise Killed()
        return real(*args, fault=fault, **kwargs)

    monkeypatch.setattr("guardband.planner.app.workflow.commit_step", interrupted)
    with pytest.raises(Killed):
        run_plan(PROTOCOL, RUNS, campaign, seed=79, pool_size=50, count=1, by="tests")
    res = run("verify", campaign / "decisions.jsonl")
    assert res.exit_code == EXIT_VERIFY
    assert re.search(r"plan-[0-9a-f]{12}\.csv \(record 1, plan_table\) is missing \(an interrupted step "
                     r"left its pending copy", res.stderr), res.stderr
    monkeypatch.setattr("guardband.planner.app.workflow.commit_step", real)
    assert run("plan", PROTOCOL, RUNS, "--out", campaign, *FAST, "--seed", 80).exit_code == 0
    res = run("verify", campaign / "decisions.jsonl", "--expect-count", 3)
    assert res.exit_code == 0, res.stderr
    # 3 plans, 3 exclusion tables, the notes file of each, 1 protocol and 1 runs copy
    assert "14 named files match" in res.stdout
    assert not [p for p in campaign.rglob(".*") if p.name.endswith(".tmp")]


# ---------------------------------------------------------- real SIGKILLs
def _trial_inputs(folder: Path, trial: int) -> tuple[Path, Path]:
    """Inputs of one trial, outside the campaign: new bytes each time, so all six files are new."""
    protocol = folder.parent / f"protocol-{trial}.toml"
    protocol.write_text(PROTOCOL.read_text().replace('title = "Corpus blend (invented)"',
                                                     f'title = "Corpus blend (invented), trial {trial}"'))
    runs = folder.parent / f"runs-{trial}.csv"
    runs.write_text(RUNS.read_text().replace(",invented", f",invented (trial {trial})", 1))
    return protocol, runs


def _child(folder: str, seed: int, kill_at: int, after: bool, inputs) -> None:  # pragma: no cover - forked
    """Plan, killing this process with SIGKILL at the ``kill_at``-th rename of the write."""
    devnull = os.open(os.devnull, os.O_WRONLY)
    os.dup2(devnull, 1)
    os.dup2(devnull, 2)
    from guardband.planner.app import campaign as campaign_module
    from guardband.planner.app.workflow import run_plan

    real_replace, calls = os.replace, [0]

    def replace(src, dst):
        calls[0] += 1
        if calls[0] == kill_at and not after:
            os.kill(os.getpid(), signal.SIGKILL)
        real_replace(src, dst)
        if calls[0] == kill_at and after:
            os.kill(os.getpid(), signal.SIGKILL)

    real_commit = campaign_module.commit_step

    def commit(*args, **kwargs):  # count only the renames of the write itself
        os.replace = replace
        return real_commit(*args, **kwargs)

    import guardband.planner.app.workflow as workflow

    workflow.commit_step = commit
    try:
        run_plan(*inputs, folder, seed=seed, pool_size=50, count=1, by="tests")
        os._exit(0)
    except BaseException:
        os._exit(3)


def drive(folder: Path, trials: int, seed: int) -> dict:  # pragma: no cover - runs in the driver
    from guardband.planner.app.audit import verify_campaign
    from guardband.planner.app.campaign import check_folder, settle
    from guardband.planner.app.workflow import run_plan
    from guardband.safety import ledger

    rng = random.Random(seed)
    run_plan(PROTOCOL, RUNS, folder, seed=1, pool_size=50, count=1, by="tests")
    log = folder / "decisions.jsonl"
    problems: list[str] = []
    outcomes = {"appended": 0, "not_appended": 0, "rolled_forward": 0, "survived": 0}
    # 6 pending files (two input copies, two tables, their notes) + the log + 6 renames into
    # place = 13 renames in a write
    points = [(k, after) for k in range(1, 14) for after in (False, True)]
    rng.shuffle(points)
    for trial in range(trials):
        k, after = points[trial % len(points)]
        count_before = ledger.verify(log).count
        inputs = _trial_inputs(folder, trial)
        pid = os.fork()
        if pid == 0:
            _child(str(folder), 1000 + trial, k, after, inputs)
        _, status = os.waitpid(pid, 0)
        if not os.WIFSIGNALED(status):
            outcomes["survived"] += 1
        result = ledger.verify(log)
        if not result.ok:
            problems.append(f"trial {trial}: the log fails: {result.problem}")
            continue
        added = result.count - count_before
        outcomes["appended" if added == 1 else "not_appended"] += 1
        # at once: nothing visible that no record names
        found = check_folder(folder, ledger.read_records(log), log_name=log.name)
        stray = [p for p in found.problems if "not named by any record" in p]
        problems += [f"trial {trial} (rename {k}, after={after}): {p}" for p in stray]
        # after the next writer settles under the lock: all files of every step, no leftovers
        with ledger.locked(log):
            placed = settle(folder, log)
        outcomes["rolled_forward"] += bool(placed)
        verdict = verify_campaign(log, expect_count=count_before + added)
        if not verdict.ok:
            problems.append(f"trial {trial} (rename {k}, after={after}): {verdict.problem}")
        if verdict.notes:
            problems.append(f"trial {trial}: leftovers after settling: {verdict.notes}")
        if added == 0 and found.unnamed:
            problems.append(f"trial {trial}: files left by a step that is not in the log: {found.unnamed}")
    return {"trials": trials, "problems": problems, "outcomes": outcomes,
            "records": ledger.verify(log).count}


@pytest.mark.slow
@pytest.mark.skipif(not hasattr(os, "fork"), reason="needs fork and SIGKILL")
def test_sigkill_at_every_rename_of_the_write_leaves_a_whole_step_or_none(tmp_path):
    folder = tmp_path / "campaign"
    env = dict(os.environ, PYTHONPATH=str(ROOT), OPENBLAS_NUM_THREADS="1", GUARDBAND_OPERATOR="tests")
    proc = subprocess.run([sys.executable, __file__, "--drive", str(folder), str(N_KILL_TRIALS), "17"],
                          cwd=ROOT, env=env, capture_output=True, text=True, timeout=900)
    assert proc.returncode == 0, proc.stderr
    report = json.loads(proc.stdout.strip().splitlines()[-1])
    assert report["problems"] == []
    out = report["outcomes"]
    assert report["trials"] == N_KILL_TRIALS >= 20
    # kills landed before the append, after it, and between the append and the renames
    assert out["appended"] >= 1 and out["not_appended"] >= 1 and out["rolled_forward"] >= 1, out
    assert out["survived"] == 0, out


if __name__ == "__main__":  # python tests/test_campaign_files.py --drive FOLDER TRIALS SEED
    if len(sys.argv) == 5 and sys.argv[1] == "--drive":
        sys.path.insert(0, str(ROOT))
        print(json.dumps(drive(Path(sys.argv[2]), int(sys.argv[3]), int(sys.argv[4]))))
    else:
        sys.exit("usage: python tests/test_campaign_files.py --drive FOLDER TRIALS SEED")
