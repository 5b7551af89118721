"""The bad-input corpus (tests/bad_inputs/CASES.toml): exit code and message, never a traceback.

Each case runs the real command line, either in a fresh process
(``python -m planner.cli``, as a user does) or through typer's CliRunner.
A refused ``plan`` must also leave its campaign folder as it was: no plan,
no exclusion table, and an existing log unchanged to the byte.
"""

from __future__ import annotations

import datetime
import os
import shutil
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest
from typer.testing import CliRunner

from guardband.planner.cli import app

HERE = Path(__file__).resolve().parent / "bad_inputs"
ROOT = HERE.parents[1]
CASES = tomllib.loads((HERE / "CASES.toml").read_text(encoding="utf-8"))["case"]
GOOD = {"good_blend.toml", "good_blend_runs.csv", "good_dose.toml", "good_dose_runs.csv", "CASES.toml"}


# ------------------------------------------------------------------ workbooks
def _good_rows() -> list[list]:
    lines = (HERE / "good_blend_runs.csv").read_text(encoding="utf-8").splitlines()
    rows = [lines[0].split(",")]
    for line in lines[1:]:
        cells = line.split(",")
        rows.append([cells[0], *[float(c) for c in cells[1:9]], cells[9]])
    return rows


def _workbook(path: Path, edit, *, title: str = "Sheet1", before: list[str] = ()) -> None:
    openpyxl = pytest.importorskip("openpyxl")
    wb = openpyxl.Workbook()
    ws = wb.active
    if before:
        ws.title = before[0]
        ws["A1"] = "free text on a first sheet"
        ws = wb.create_sheet(title)
    else:
        ws.title = title
    for row in _good_rows():
        ws.append(row)
    ws.append([])  # blank rows at the end, as spreadsheets leave them
    ws.append([None, None, None])
    edit(ws)
    wb.save(path)


def _set(**cells):
    def edit(ws):
        for ref, value in cells.items():
            ws[ref] = value
    return edit


BUILDERS = {
    "formula_without_result": lambda p: _workbook(p, _set(C5="=C4*2")),
    "error_value": lambda p: _workbook(p, _set(G6="#DIV/0!")),
    "date_in_number_column": lambda p: _workbook(p, _set(E3=datetime.date(2026, 3, 4))),
    "true_false": lambda p: _workbook(p, _set(H4=True)),
    "text_in_number_column": lambda p: _workbook(p, _set(F8="  approx 120 "), title="Lab runs"),
    "unit_wrong_dimension": lambda p: _workbook(p, _set(F1="api_mass [mL]")),
    "mixture_sum": lambda p: _workbook(p, _set(B2=0.9696)),
    "two_sheets": lambda p: _workbook(p, lambda ws: None, title="Lab runs", before=["Notes"]),
}


# ------------------------------------------------------------------ running
def _case_id(case: dict) -> str:
    opts = "".join(case.get("options", []))
    return f"{case['command']}:{case['file']}{':' + opts if opts else ''}"


def _argv(case: dict, tmp_path: Path) -> tuple[list[str], Path, Path | None]:
    """Command line, campaign folder, and the log copied into it (if any)."""
    name = case["file"]
    if "build" in case:
        path = tmp_path / name
        BUILDERS[case["build"]](path)
    else:
        path = HERE / name
    out = tmp_path / "campaign"
    log = None
    command = case["command"]
    protocol = HERE / case.get("protocol", "good_blend.toml")
    runs = HERE / ("good_dose_runs.csv" if case.get("protocol") == "good_dose.toml" else "good_blend_runs.csv")
    if command == "check":
        argv = ["check", path]
    elif command == "verify":
        argv = ["verify", path]
    elif command == "plan":
        argv = ["plan", protocol, path, "--out", out]
    elif command == "plan-protocol":
        argv = ["plan", path, runs, "--out", out]
    elif command == "plan-into-log":
        out.mkdir()
        log = out / "decisions.jsonl"
        shutil.copyfile(path, log)
        argv = ["plan", protocol, runs, "--out", out]
    elif command == "plan-out-file":
        out = tmp_path / "a_file"
        out.write_text("not a folder\n")
        argv = ["plan", protocol, runs, "--out", out]
    else:  # pragma: no cover - a typo in CASES.toml
        raise AssertionError(f"unknown command {command!r}")
    return [str(a) for a in argv] + list(case.get("options", [])), out, log


def _env() -> dict:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    env.pop("GUARDBAND_DEBUG", None)
    return env


def _in_process(argv: list[str]) -> tuple[int, str, str]:
    res = CliRunner().invoke(app, argv)
    # an exception other than the exit itself is what a user would see as a traceback
    assert res.exception is None or isinstance(res.exception, SystemExit), repr(res.exception)
    return res.exit_code, res.stdout, res.stderr


@pytest.fixture(scope="module")
def fresh_processes(tmp_path_factory):
    """The cases run as a user runs them, all started at once (they spend their time importing)."""
    started = {}
    for k, case in enumerate(CASES):
        if case.get("via") == "subprocess":
            argv, out, log = _argv(case, tmp_path_factory.mktemp(f"case{k}"))
            before = log.read_bytes() if log else None
            proc = subprocess.Popen([sys.executable, "-m", "guardband.planner.cli", *argv], cwd=ROOT, env=_env(),
                                    stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
            started[k] = (proc, out, log, before)
    results = {}
    for k, (proc, out, log, before) in started.items():
        stdout, stderr = proc.communicate(timeout=300)
        results[k] = (proc.returncode, stdout, stderr, out, log, before)
    return results


@pytest.mark.parametrize("index", range(len(CASES)), ids=[_case_id(c) for c in CASES])
def test_bad_input_is_refused_with_its_exit_code_and_message(index, tmp_path, request):
    case = CASES[index]
    if case.get("via") == "subprocess":
        code, stdout, stderr, out, log, log_before = request.getfixturevalue("fresh_processes")[index]
    else:
        argv, out, log = _argv(case, tmp_path)
        log_before = log.read_bytes() if log else None
        code, stdout, stderr = _in_process(argv)
    assert code == case["exit"], stderr
    for fragment in case["message"]:
        assert fragment in stderr, f"{fragment!r} not in:\n{stderr}"
    assert "Traceback" not in stdout + stderr
    assert "Internal error" not in stdout + stderr
    assert "Error" in stderr
    if case["command"].startswith("plan") and out.is_dir():
        # refused before anything was written
        assert not list(out.glob("plan-*.csv")) and not list(out.glob("exclusions-*.csv"))
        if log is None:
            assert not (out / "decisions.jsonl").exists()
        else:
            assert log.read_bytes() == log_before


def test_corpus_is_complete():
    files = {p.name for p in HERE.iterdir() if p.is_file()}
    used = {c["file"] for c in CASES if "build" not in c}
    built = {c["build"] for c in CASES if "build" in c}
    corpus = files - GOOD
    assert len(corpus) >= 40
    assert corpus <= used, f"files without a case: {sorted(corpus - used)}"
    missing = {f for f in used - files if not f.startswith("no_such_")}
    assert not missing, f"cases without a file: {sorted(missing)}"
    assert built == set(BUILDERS)
    for case in CASES:
        assert case["exit"] in (2, 3, 4, 5, 6, 7, 8) and case["message"], case


def test_good_corpus_bases_plan(tmp_path):
    # the bases the bad files were made from are themselves accepted
    for protocol, runs in (("good_blend.toml", "good_blend_runs.csv"), ("good_dose.toml", "good_dose_runs.csv")):
        code, stdout, stderr = _in_process(["plan", str(HERE / protocol), str(HERE / runs),
                                            "--out", str(tmp_path / protocol), "--seed", "5"])
        assert code == 0, stderr
