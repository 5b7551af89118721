"""Determinism: the same protocol, runs, seed and version give the same bytes.

Two fresh processes that differ in everything that should not matter
(folder, Python's hash seed, the number of BLAS threads) must write the
same plan table, exclusion table and input copies, and decision-log
records that differ only in the time (and so the hash that covers it).
A plan with no seed draws one, prints it and records it, and the record
replays to the same plan.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

from typer.testing import CliRunner

from guardband.planner.cli import app
from guardband.safety import ledger

ROOT = Path(__file__).resolve().parents[1]
HERE = Path(__file__).resolve().parent / "bad_inputs"
TABLET = ROOT / "protocols" / "tablet_blend.toml"
TABLET_RUNS = ROOT / "protocols" / "tablet_blend_runs.csv"
runner = CliRunner()


def _files(folder: Path) -> dict[str, bytes]:
    return {p.relative_to(folder).as_posix(): p.read_bytes()
            for p in sorted(folder.rglob("*")) if p.is_file() and not p.name.endswith(".lock")}


def _without_time(record: dict) -> dict:
    return {k: v for k, v in record.items() if k not in ("time", "hash")}


def test_same_seed_in_two_processes_gives_identical_bytes(tmp_path):
    procs = []
    for k, (hash_seed, blas) in enumerate((("1", "1"), ("2", "2"))):
        env = dict(os.environ, PYTHONPATH=str(ROOT), PYTHONHASHSEED=hash_seed, OPENBLAS_NUM_THREADS=blas)
        out = tmp_path / f"campaign-{k}"
        # refine stays on (the protocol's 4): the refinement is where BLAS threads showed
        procs.append((out, subprocess.Popen(
            [sys.executable, "-m", "guardband.planner.cli", "plan", str(TABLET), str(TABLET_RUNS), "--out", str(out),
             "--seed", "42", "--pool", "150", "--count", "2"],
            cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)))
    for out, proc in procs:
        _, err = proc.communicate(timeout=300)
        assert proc.returncode == 0, err
    (a, _), (b, _) = procs
    files_a, files_b = _files(a), _files(b)
    logs = files_a.pop("decisions.jsonl"), files_b.pop("decisions.jsonl")
    assert files_a == files_b  # the tables, their notes and inputs/*: same names, same bytes
    assert len([n for n in files_a if n.startswith("plan-") and n.endswith(".csv")]) == 1
    rec_a, rec_b = (json.loads(log) for log in logs)
    assert rec_a["body"] == rec_b["body"]
    assert _without_time(rec_a) == _without_time(rec_b)


def test_in_process_plan_matches_a_fresh_process(tmp_path):
    # caches inside one process (design space, LP results) must not change a plan
    args = [str(TABLET), str(TABLET_RUNS), "--seed", "7", "--pool", "100", "--count", "2"]
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.Popen([sys.executable, "-m", "guardband.planner.cli", "plan", *args, "--out", str(tmp_path / "fresh")],
                            cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    for k in range(2):
        res = runner.invoke(app, ["plan", *args, "--out", str(tmp_path / f"in-{k}")])
        assert res.exit_code == 0, res.output
    _, err = proc.communicate(timeout=300)
    assert proc.returncode == 0, err
    fresh = _files(tmp_path / "fresh")
    for k in range(2):
        mine = _files(tmp_path / f"in-{k}")
        rec_mine, rec_fresh = json.loads(mine.pop("decisions.jsonl")), json.loads(fresh["decisions.jsonl"])
        assert mine == {n: v for n, v in fresh.items() if n != "decisions.jsonl"}
        assert rec_mine["body"] == rec_fresh["body"]


def test_without_a_seed_one_is_drawn_printed_recorded_and_replayed(tmp_path):
    protocol, runs = HERE / "good_dose.toml", HERE / "good_dose_runs.csv"
    assert "seed" not in protocol.read_text()
    seeds = []
    for k in range(2):
        out = tmp_path / f"c{k}"
        res = runner.invoke(app, ["plan", str(protocol), str(runs), "--out", str(out)])
        assert res.exit_code == 0, res.output
        m = re.search(r"seed used: (\d+) \(drawn; recorded in the log\)", res.stderr)
        assert m, res.stderr
        body = ledger.read_records(out / "decisions.jsonl")[0]["body"]
        assert body["seed"] == int(m.group(1)) and body["seed_drawn"] is True
        assert f"seed {body['seed']};" in next(out.glob("plan-*.notes.txt")).read_text()
        seeds.append(body["seed"])
        rep = runner.invoke(app, ["replay", str(out / "decisions.jsonl"), "--record", "0"])
        assert rep.exit_code == 0 and "identical" in rep.stdout, rep.output
    # two draws from 2**63 seeds agree with probability 2**-63
    assert seeds[0] != seeds[1]


def test_a_given_seed_is_used_and_not_reported_as_drawn(tmp_path):
    for extra, expected in (([], 20261201), (["--seed", "5"], 5)):  # the protocol's seed, then the option's
        out = tmp_path / f"s{expected}"
        res = runner.invoke(app, ["plan", str(TABLET), str(TABLET_RUNS), "--out", str(out), "--pool", "100",
                                  "--count", "1", *extra])
        assert res.exit_code == 0, res.output
        assert "drawn" not in res.stderr
        body = ledger.read_records(out / "decisions.jsonl")[0]["body"]
        assert body["seed"] == expected and body["seed_drawn"] is False


def _plan(out: Path, runs: Path = TABLET_RUNS, seed: int = 8):
    res = runner.invoke(app, ["plan", str(TABLET), str(runs), "--out", str(out), "--seed", str(seed),
                              "--pool", "200", "--count", "2", "--format", "json"], catch_exceptions=False)
    assert res.exit_code == 0, res.output
    return json.loads(res.stdout)


def test_replanning_into_the_same_folder_is_identical(tmp_path):
    out = tmp_path / "campaign"
    first, again = _plan(out), _plan(out)
    same = ("proposals", "models", "step_label", "plan_table", "exclusion_table", "warm_start",
            "warm_start_from", "incumbent", "counts")
    assert {k: first[k] for k in same} == {k: again[k] for k in same}
    assert first["warm_start_from"] is None
    assert [r["kind"] for r in ledger.read_records(out / "decisions.jsonl")] == ["plan", "plan"]


def test_a_plan_on_new_runs_says_which_record_it_warm_started_from(tmp_path):
    out = tmp_path / "campaign"
    _plan(out)
    # the same runs with one more (invented) measured run: a new step
    lines = TABLET_RUNS.read_text().splitlines()
    extra = "R99,0.1,0.44,0.40,0.03,0.02,0.01,12,70.0,0.12,0.7,invented"
    (tmp_path / "runs.csv").write_text("\n".join([*lines, extra]) + "\n")
    new = _plan(out, tmp_path / "runs.csv")
    assert new["warm_start_from"] == 0 and new["warm_start"]
    # and re-planning that step again reuses the same warm start, so the same plan
    again = _plan(out, tmp_path / "runs.csv")
    assert again["proposals"] == new["proposals"] and again["warm_start_from"] == 0
