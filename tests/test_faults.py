"""Faults: a plan killed at any moment, and two plans at once, leave whole files and a valid log.

The kill test is real (50 trials): a ``guardband plan`` process is killed with SIGKILL.
To afford many trials, a driver process (this file run as a script)
imports the tool once and forks one child per trial; the child runs the
command line's ``main()`` exactly as ``guardband plan`` does. Most kills
are aimed at the writing phase: the driver watches the campaign folder,
whose modification time changes when the first output file is created
(under its pending name), and kills after a random part of the writing time
measured beforehand; the other kills fall anywhere in the run. No hook in
the tool is used.

After every trial the campaign must pass verification, the old log must
be a prefix of the new one, every file a record names must exist with
the recorded SHA-256, and every output file must be whole: it parses as
CSV (or is the exact input copy) and its name's 12-hex-digit digest
matches its bytes. Temporary files (hidden, ``.tmp``) left by a kill are
counted, not taken for outputs; a kill may leave them, but never an output
file that no record names. After each trial the driver does what the next
writer does first under the lock (``campaign.settle``), and then nothing
but whole, recorded files may remain.

A SIGKILL loses nothing already handed to the kernel, so these trials test
the order of writes, renames and the lock, not the ``fsync`` calls that
protect against a power cut.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
HERE = Path(__file__).resolve().parent / "bad_inputs"
PROTOCOL = HERE / "good_blend.toml"
RUNS = HERE / "good_blend_runs.csv"
N_TRIALS = 50
#: the folder whose modification time marks the start of writing: every
#: trial uses the same inputs, whose copies are already in place and are left
#: alone, so the first new entry is the exclusion table's temporary file in
#: the campaign folder itself
WATCH = "."


# ------------------------------------------------------------------ checks
def _digest(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _csv_problem(path: Path) -> str | None:
    text = path.read_text(encoding="utf-8")
    if not text.endswith("\n"):
        return f"{path.name} does not end with a newline"
    rows = list(csv.reader(io.StringIO("\n".join(ln for ln in text.splitlines() if not ln.startswith("#")))))
    if len(rows) < 1 or any(len(r) != len(rows[0]) for r in rows):
        return f"{path.name} has rows of different lengths"
    return None


def _named_bytes(folder: Path, path: Path) -> tuple[Path, bytes | None]:
    """The file whose name carries the digest, and the bytes it is of (None: part of them is missing).

    An input copy's name carries its own digest; a table's and its notes file's, that of the
    table's bytes followed by the notes' bytes.
    """
    from guardband.planner.app.fileio import NOTES_SUFFIX, notes_path

    if path.parent != folder:
        return path, path.read_bytes()
    table = path.with_name(path.name[:-len(NOTES_SUFFIX)] + ".csv") if path.name.endswith(NOTES_SUFFIX) else path
    notes = Path(notes_path(table))
    if not (table.exists() and notes.exists()):
        return table, None
    return table, table.read_bytes() + notes.read_bytes()


def check_campaign(folder: Path, previous_log: bytes) -> tuple[list[str], dict]:
    """Problems found in a campaign folder, and what it holds."""
    from guardband.safety import ledger

    problems: list[str] = []
    log = folder / "decisions.jsonl"
    data = log.read_bytes() if log.exists() else b""
    result = ledger.verify(log) if log.exists() else None
    if result is not None and not result.ok:
        problems.append(f"log fails verification: {result.problem}")
    if not data.startswith(previous_log):
        problems.append("the earlier log is not a prefix of the new one")
    records = ledger.read_records(log) if result is not None and result.ok else []
    recorded = {}
    for rec in records:
        body = rec["body"]
        for key in ("plan_table", "plan_notes", "exclusion_table", "exclusion_notes"):
            recorded[folder / body[key]["file"]] = body[key]["sha256"]
        for key in ("protocol_file", "runs_file"):
            recorded[folder / body[key]["copy"]] = body[key]["sha256"]
    for path, sha in recorded.items():
        if not path.exists():
            problems.append(f"{path.name} is named by a record but missing")
        elif _digest(path.read_bytes()) != sha:
            problems.append(f"{path.name} does not match the hash its record gives")
    temps, outputs = [], []
    for path in sorted(folder.rglob("*")):
        if not path.is_file() or path.name.endswith(".lock") or path == log:
            continue
        if path.name.startswith(".") and path.name.endswith(".tmp"):
            temps.append(path)
            continue
        outputs.append(path)
        named, named_data = _named_bytes(folder, path)
        stem = named.stem.rsplit("-", 1)
        if named_data is None or len(stem) != 2 or _digest(named_data)[:12] != stem[1]:
            problems.append(f"{path.relative_to(folder)} is partial or altered (its name's digest differs)")
        elif path.suffix == ".csv" and path.parent == folder:
            problem = _csv_problem(path)
            if problem:
                problems.append(problem)
    return problems, {"records": len(records), "outputs": len(outputs), "temps": len(temps),
                      "unrecorded": len([p for p in outputs if p not in recorded]), "log": data}


# ------------------------------------------------------------------ driver
def _child(argv: list[str]) -> None:  # pragma: no cover - runs in a forked process
    devnull = os.open(os.devnull, os.O_WRONLY)
    os.dup2(devnull, 1)
    os.dup2(devnull, 2)
    code = 1
    try:
        from guardband.planner.cli import main

        sys.argv = ["guardband", *argv]
        main()
        code = 0
    except SystemExit as exc:
        code = exc.code if isinstance(exc.code, int) else 1
    finally:
        os._exit(code)


def _fork_plan(folder: Path, seed: int) -> int:
    pid = os.fork()
    if pid == 0:  # pragma: no cover
        _child(["plan", str(PROTOCOL), str(RUNS), "--out", str(folder), "--seed", str(seed)])
    return pid


def _status(status: int) -> tuple[bool, int]:
    if os.WIFSIGNALED(status):
        return True, os.WTERMSIG(status)
    return False, os.WEXITSTATUS(status)


def _wait(pid: int) -> tuple[bool, int]:
    return _status(os.waitpid(pid, 0)[1])


def _wait_for_change(pid: int, path: Path, before: int) -> tuple[bool, int] | None:
    """Poll until ``path`` changes; the child's status if it ended first."""
    while os.stat(path).st_mtime_ns == before:
        done, status = os.waitpid(pid, os.WNOHANG)
        if done:
            return _status(status)
        time.sleep(0.0002)  # poll without taking the child's core
    return None


def drive(folder: Path, trials: int, seed: int) -> dict:  # pragma: no cover - runs in the driver
    from guardband.planner.app.campaign import settle
    from guardband.planner.app.workflow import run_plan
    from guardband.safety import ledger

    rng = random.Random(seed)
    run_plan(PROTOCOL, RUNS, folder, seed=1)  # a campaign with history; warms the imports
    inputs = folder / WATCH
    # measure: time from the first output file to the end, and the whole run
    writing, total = [], []
    for k in range(3):
        before = os.stat(inputs).st_mtime_ns
        t0 = time.perf_counter()
        pid = _fork_plan(folder, 10_000 + k)
        if _wait_for_change(pid, inputs, before) is not None:
            raise RuntimeError("calibration plan ended before writing")
        t1 = time.perf_counter()
        killed, code = _wait(pid)
        t2 = time.perf_counter()
        if killed or code != 0:
            raise RuntimeError(f"calibration plan failed ({code})")
        writing.append(t2 - t1)
        total.append(t2 - t0)
    write_time, run_time = max(writing), max(total)

    problems: list[str] = []
    outcomes = {"appended": 0, "not_appended": 0, "finished_before_kill": 0,
                "aimed_at_writing": 0, "anywhere": 0, "left_unrecorded_files": 0, "left_temp_files": 0}
    previous = check_campaign(folder, b"")[1]
    for trial in range(trials):
        before = os.stat(inputs).st_mtime_ns
        aim = rng.random() < 0.8
        pid = _fork_plan(folder, 20_000 + trial)
        ended = None
        if aim:
            outcomes["aimed_at_writing"] += 1
            ended = _wait_for_change(pid, inputs, before)
            if ended is None:
                time.sleep(rng.uniform(0.0, 1.2 * write_time))
        else:
            outcomes["anywhere"] += 1
            time.sleep(rng.uniform(0.0, 1.1 * run_time))
        if ended is None:
            os.kill(pid, signal.SIGKILL)  # a child that has ended but is not reaped takes it silently
            ended = _wait(pid)
        killed = ended[0]
        if not killed:
            outcomes["finished_before_kill"] += 1
        _, at_once = check_campaign(folder, previous["log"])
        if at_once["unrecorded"] > previous["unrecorded"]:
            problems.append(f"trial {trial}: the kill left output files that no record names")
        if at_once["temps"] > previous["temps"]:
            outcomes["left_temp_files"] += 1
        # what the next writer does first, under the lock: a step killed between
        # its record and its renames is put in place; other leftovers are removed
        with ledger.locked(folder / "decisions.jsonl"):
            settle(folder, folder / "decisions.jsonl")
        found, state = check_campaign(folder, previous["log"])
        problems += [f"trial {trial}: {p}" for p in found]
        if state["temps"]:
            problems.append(f"trial {trial}: {state['temps']} temporary files remain after settling")
        added = state["records"] - previous["records"]
        if added not in (0, 1):
            problems.append(f"trial {trial}: the log went from {previous['records']} to {state['records']} records")
        outcomes["appended" if added == 1 else "not_appended"] += 1
        if state["unrecorded"] > previous["unrecorded"]:
            outcomes["left_unrecorded_files"] += 1
        previous = state
    return {"trials": trials, "problems": problems, "outcomes": outcomes, "records": previous["records"],
            "temp_files": previous["temps"], "write_time": write_time, "run_time": run_time}


# ------------------------------------------------------------------ tests
def _env() -> dict:
    return dict(os.environ, PYTHONPATH=str(ROOT), OPENBLAS_NUM_THREADS="1")


@pytest.mark.slow
@pytest.mark.skipif(not hasattr(os, "fork"), reason="needs fork and SIGKILL")
def test_plan_killed_at_random_moments_leaves_whole_files_and_a_valid_log(tmp_path):
    folder = tmp_path / "campaign"
    proc = subprocess.run([sys.executable, __file__, "--drive", str(folder), str(N_TRIALS), "2026"],
                          cwd=ROOT, env=_env(), capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr
    report = json.loads(proc.stdout)
    assert report["problems"] == []
    out = report["outcomes"]
    assert report["trials"] == N_TRIALS >= 50
    # the kills did land on both sides of the append, and some inside the writing
    assert out["appended"] >= 1 and out["not_appended"] >= 1
    # kills inside the writing left temporary files, never output files that no record names
    assert out["left_temp_files"] >= 1 and out["left_unrecorded_files"] == 0, out
    # and the real command line agrees about the log
    res = subprocess.run([sys.executable, "-m", "guardband.planner.cli", "verify", str(folder / "decisions.jsonl"),
                          "--expect-count", str(report["records"])],
                         cwd=ROOT, env=_env(), capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    assert "Traceback" not in res.stdout + res.stderr


def test_two_plans_at_once_on_one_campaign_leave_a_valid_chain(tmp_path):
    from guardband.safety import ledger

    folder = tmp_path / "campaign"
    procs = [subprocess.Popen([sys.executable, "-m", "guardband.planner.cli", "plan", str(PROTOCOL), str(RUNS),
                               "--out", str(folder), "--seed", str(seed)],
                              cwd=ROOT, env=_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for seed in (101, 202)]
    for proc in procs:
        _, err = proc.communicate(timeout=300)
        assert proc.returncode == 0, err
    problems, state = check_campaign(folder, b"")
    assert problems == []
    records = ledger.read_records(folder / "decisions.jsonl")
    assert len(records) == state["records"] == 2
    assert [r["index"] for r in records] == [0, 1]
    assert records[1]["prev"] == records[0]["hash"]
    assert sorted(r["body"]["seed"] for r in records) == [101, 202]
    assert state["unrecorded"] == 0 and state["temps"] == 0
    res = subprocess.run([sys.executable, "-m", "guardband.planner.cli", "verify", str(folder / "decisions.jsonl"),
                          "--expect-count", "2"], cwd=ROOT, env=_env(), capture_output=True, text=True, timeout=120)
    assert res.returncode == 0 and "ok: 2 records" in res.stdout, res.stderr


if __name__ == "__main__":  # the fault driver: python tests/test_faults.py --drive FOLDER TRIALS SEED
    if len(sys.argv) == 5 and sys.argv[1] == "--drive":
        sys.path.insert(0, str(ROOT))
        print(json.dumps(drive(Path(sys.argv[2]), int(sys.argv[3]), int(sys.argv[4]))))
    else:
        sys.exit("usage: python tests/test_faults.py --drive FOLDER TRIALS SEED")
