"""Inputs a careless or hostile user gives: numbers out of range, files that hang, deep nesting.

Every case runs the real command line and checks the exit code (README's
exit-code table), the words of the message (naming the file, field, row or
column), that no traceback or library warning reached the user, and that
nothing was written: no campaign folder, or the log unchanged to the byte.
The cases are our own (invented protocols and runs in tests/bad_inputs).
"""

from __future__ import annotations

import io
import os
import re
import subprocess
import sys
import zipfile
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from guardband.planner import settings
from guardband.planner.cli import app
from guardband.planner.errors import ProtocolError, RunsDataError, VerificationError
from guardband.planner.inputs import reading
from guardband.planner.inputs.protocol import load_protocol
from guardband.planner.inputs.rules import RuleSyntaxError, parse_rule
from guardband.planner.inputs.units import conversion
from guardband.safety import ledger

HERE = Path(__file__).resolve().parent / "bad_inputs"
ROOT = HERE.parents[1]
GOOD_TOML = (HERE / "good_blend.toml").read_text(encoding="utf-8")
GOOD_RUNS = (HERE / "good_blend_runs.csv").read_text(encoding="utf-8")
RULE = 'rule = "binder <= 2 * disintegrant + 0.1"'


def _cli(argv) -> tuple[int, str, str]:
    res = CliRunner().invoke(app, [str(a) for a in argv], color=True)
    assert res.exception is None or isinstance(res.exception, SystemExit), repr(res.exception)
    return res.exit_code, res.stdout, res.stderr


def _refused(argv, code: int, *fragments: str) -> str:
    got, stdout, stderr = _cli(argv)
    assert got == code, stderr
    for fragment in fragments:
        assert fragment in stderr, f"{fragment!r} not in:\n{stderr}"
    for bad in ("Traceback", "Internal error", "Warning"):
        assert bad not in stdout + stderr
    return stderr


def _protocol(tmp_path: Path, text: str, name: str = "p.toml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def _runs(tmp_path: Path, edit=None, name: str = "runs.csv") -> Path:
    rows = [line.split(",") for line in GOOD_RUNS.splitlines()]
    if edit:
        edit(rows)
    path = tmp_path / name
    path.write_text("\n".join(",".join(r) for r in rows) + "\n", encoding="utf-8")
    return path


def _plan_refused(tmp_path, protocol, runs, code, *fragments, extra=()) -> str:
    out = tmp_path / "campaign"
    stderr = _refused(["plan", protocol, runs, "--out", out, *extra], code, *fragments)
    assert not out.exists(), "a refused plan must write nothing"
    return stderr


# ------------------------------------------------ 5. numbers out of range
@pytest.mark.parametrize("setting, field", [
    ("[ranking]\nkappa = inf", "ranking.kappa: inf is not a finite number"),
    ("[ranking]\nxi = nan", "ranking.xi: nan is not a finite number"),
    ("[ranking]\nkappa = 1e308", "ranking.kappa: 1e+308 is larger in size than"),
    ("[ranking]\nxi = 1e150", "ranking.xi: 1e+150 is larger in size than"),
])
def test_non_finite_and_huge_settings_are_refused_by_field(tmp_path, setting, field):
    path = _protocol(tmp_path, GOOD_TOML + "\n" + setting + "\n")
    _refused(["check", path], 3, "p.toml", field)
    _plan_refused(tmp_path, path, HERE / "good_blend_runs.csv", 3, field)


def test_a_huge_bound_a_total_and_levels_are_refused_by_field(tmp_path):
    text = GOOD_TOML.replace("lower = 5\nupper = 20", "lower = 5\nupper = -inf")
    _refused(["check", _protocol(tmp_path, text)], 3, "factors[3].upper: -inf is not a finite number")
    text = GOOD_TOML.replace("total = 1.0", "total = 1e200")
    _refused(["check", _protocol(tmp_path, text)], 3, "mixture.total: 1e+200 is larger in size")
    text = GOOD_TOML.replace("upper = 0.5\n", "upper = 1e101\n")
    _refused(["check", _protocol(tmp_path, text)], 3, "limits[0].upper: 1e+101")


@pytest.mark.parametrize("rule, fragment", [
    ("binder <= 1e999", "the number 1e999 is larger in size"),
    ("binder * 1e60 * 1e60 <= 3", "works out to 1e+120"),
    ("binder * 1e99 * 20 <= 3", "works out to 2e+100"),
])
def test_a_rule_with_an_overflowing_number_is_refused(tmp_path, rule, fragment):
    path = _protocol(tmp_path, GOOD_TOML.replace(RULE, f'rule = "{rule}"'))
    _refused(["check", path], 3, "constraints[0].rule", fragment)


def test_a_response_near_1e300_is_refused_naming_row_and_column(tmp_path):
    def edit(rows):
        rows[3][6] = "1e300"
    stderr = _plan_refused(tmp_path, HERE / "good_blend.toml", _runs(tmp_path, edit), 4,
                           "row 4 (run C03), column dissolution", "'1e300' is larger in size")
    assert "not measured" not in stderr


def test_a_value_that_overflows_when_its_unit_is_converted_is_refused_not_lost(tmp_path):
    # 1e95 t = 1e104 mg (1 t = 1e9 mg, SI definition): beyond the largest value read
    def edit(rows):
        rows[0][5] = "api_mass [t]"
        rows[3][5] = "1e95"
    _plan_refused(tmp_path, HERE / "good_blend.toml", _runs(tmp_path, edit), 4,
                  "row 4 (run C03), column api_mass: 1e+95 [t] converts to 1e+104 [mg]")


def test_converting_a_tiny_value_gives_a_number_not_nan():
    # rounding to 12 significant digits must not overflow its scale for a subnormal value
    out = conversion("t", "mg").apply(np.array([1e-320, 2.5e-3, np.nan]))
    assert np.isfinite(out[:2]).all() and np.isnan(out[2])
    assert out[1] == pytest.approx(2.5e6, rel=1e-12)  # 1 t = 1e9 mg


def _workbook(rows_edit=None, sheet_edit=None) -> bytes:
    openpyxl = pytest.importorskip("openpyxl")
    wb = openpyxl.Workbook()
    ws = wb.active
    rows = [line.split(",") for line in GOOD_RUNS.splitlines()]
    for i, r in enumerate(rows):
        ws.append(r if i == 0 else [r[0], *map(float, r[1:9]), r[9]])
    buf = io.BytesIO()
    wb.save(buf)
    raw = buf.getvalue()
    if sheet_edit is None:
        return raw
    src, out = zipfile.ZipFile(io.BytesIO(raw)), io.BytesIO()
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as dst:
        for item in src.infolist():
            data = src.read(item.filename)
            if item.filename == "xl/worksheets/sheet1.xml":
                data = sheet_edit(data.decode("utf-8")).encode("utf-8")
            dst.writestr(item, data)
    return out.getvalue()


def _cell_value(ref: str, value: str):
    return lambda xml: re.sub(rf'(<c r="{ref}"[^>]*>)<v>[^<]*</v>', rf"\g<1><v>{value}</v>", xml)


@pytest.mark.parametrize("value, fragments", [
    ("inf", ["sheet 'Sheet', row 4: a cell cannot be read", "not a finite number"]),
    ("1e300", ["row 4 (run C03), column dissolution (Sheet!G4)", "larger in size"]),
])
def test_a_workbook_number_cell_out_of_range_is_refused(tmp_path, value, fragments):
    path = tmp_path / "runs.xlsx"
    path.write_bytes(_workbook(sheet_edit=_cell_value("G4", value)))
    _plan_refused(tmp_path, HERE / "good_blend.toml", path, 4, *fragments)


# ------------------------------------------------ 6. files that hang or are too big
def _fresh(argv, timeout=120):
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    env.pop("GUARDBAND_DEBUG", None)
    return subprocess.Popen([sys.executable, "-m", "guardband.planner.cli", *map(str, argv)], cwd=ROOT, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="no FIFOs on this system")
def test_a_fifo_given_as_protocol_runs_file_or_log_is_refused_at_once(tmp_path):
    fifo = tmp_path / "pipe"
    os.mkfifo(fifo)
    campaign = tmp_path / "campaign"
    campaign.mkdir()
    os.mkfifo(campaign / "decisions.jsonl")
    cases = [
        (["check", fifo], 3, "the protocol file"),
        (["plan", HERE / "good_blend.toml", fifo, "--out", tmp_path / "c1"], 4, "the runs file"),
        (["verify", fifo], 5, "decision log"),
        (["plan", HERE / "good_blend.toml", HERE / "good_blend_runs.csv", "--out", campaign], 5, "decision log"),
    ]
    started = [(_fresh(argv), code, what) for argv, code, what in cases]  # in parallel: mostly import time
    for proc, code, what in started:
        try:
            stdout, stderr = proc.communicate(timeout=300)
        except subprocess.TimeoutExpired:  # the defect itself: a read that blocks
            proc.kill()
            pytest.fail(f"blocked on a FIFO: {what}")
        assert proc.returncode == code, stderr
        assert what in stderr and "a FIFO (named pipe), not a regular file" in stderr
        assert "Traceback" not in stderr
    assert not (tmp_path / "c1").exists()
    assert sorted(p.name for p in campaign.iterdir()) == ["decisions.jsonl"]
    assert os.path.exists(campaign / "decisions.jsonl") and not (campaign / "decisions.jsonl").is_file()


def test_missing_unreadable_and_folder_inputs_share_their_kinds_exit_code(tmp_path, monkeypatch):
    folder = tmp_path / "folder"
    folder.mkdir()
    missing = tmp_path / "no_such_file"
    good_p, good_r = HERE / "good_blend.toml", HERE / "good_blend_runs.csv"
    for bad, why in ((missing, "No such file or directory"), (folder, "it is a folder")):
        _refused(["check", bad], 3, f"{bad}: cannot read the protocol file", why)
        _plan_refused(tmp_path, good_p, bad, 4, f"{bad}: cannot read the runs file", why)
        _refused(["verify", bad], 5, why)
    # unreadable (permission denied): the same codes as missing
    real_open = os.open
    locked = {str(tmp_path / "locked.toml"), str(tmp_path / "locked.csv")}

    def no_permission(path, *args, **kwargs):
        if os.fspath(path) in locked:
            raise PermissionError(13, "Permission denied")
        return real_open(path, *args, **kwargs)

    (tmp_path / "locked.toml").write_text(GOOD_TOML, encoding="utf-8")
    (tmp_path / "locked.csv").write_text(GOOD_RUNS, encoding="utf-8")
    monkeypatch.setattr(reading.os, "open", no_permission)
    _refused(["check", tmp_path / "locked.toml"], 3, "cannot read the protocol file (Permission denied)")
    _plan_refused(tmp_path, good_p, tmp_path / "locked.csv", 4, "cannot read the runs file (Permission denied)")


def test_an_input_larger_than_its_limit_is_refused_before_it_is_read(tmp_path, monkeypatch):
    from guardband.planner.inputs.runs import read_runs

    protocol = load_protocol(HERE / "good_blend.toml")
    monkeypatch.setattr(settings, "MAX_PROTOCOL_BYTES", 200)
    monkeypatch.setattr(settings, "MAX_RUNS_FILE_BYTES", 300)
    _refused(["check", HERE / "good_blend.toml"], 3, "cannot read the protocol file",
             "more than 200 bytes")
    with pytest.raises(RunsDataError, match="more than 300 bytes"):
        read_runs(HERE / "good_blend_runs.csv", protocol)


def test_more_runs_than_the_stated_maximum_are_refused_with_how_to_raise_it(tmp_path):
    _plan_refused(tmp_path, HERE / "good_blend.toml", HERE / "good_blend_runs.csv", 4,
                  "up to 10 runs", "more than the 5 a planning step takes", "--max-runs 10",
                  extra=["--max-runs", "5"])
    # exactly at the limit the step is planned; blank rows at the end are not runs
    runs = _runs(tmp_path, lambda rows: rows.extend([[""], [""]]))
    code, _, stderr = _cli(["plan", HERE / "good_blend.toml", runs, "--out", tmp_path / "ok", "--max-runs", "10"])
    assert code in (0, 6), stderr


def test_a_workbook_with_more_runs_than_the_maximum_is_refused(tmp_path):
    path = tmp_path / "runs.xlsx"
    path.write_bytes(_workbook())
    _plan_refused(tmp_path, HERE / "good_blend.toml", path, 4, "runs.xlsx: 10 runs, more than the 4",
                  "--max-runs 10", extra=["--max-runs", "4"])


def test_ten_thousand_runs_get_a_refusal_by_default(tmp_path):
    rng = np.random.default_rng(3)
    lines = [GOOD_RUNS.splitlines()[0]]
    for k in range(10_000):
        b, d = rng.uniform(0.05, 0.15), rng.uniform(0.03, 0.1)
        lines.append(f"R{k},{1 - b - d:.4f},{b:.4f},{d:.4f},{rng.uniform(5, 20):.2f},{rng.uniform(50, 150):.1f},"
                     f"{rng.uniform(40, 70):.2f},{rng.uniform(0.1, 0.4):.3f},{rng.uniform(0.3, 0.9):.3f},x")
    path = tmp_path / "many.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    assert settings.MAX_RUNS_DEFAULT < 10_000
    _plan_refused(tmp_path, HERE / "good_blend.toml", path, 4, "up to 10,000 runs (its lines below the header), "
                  "more than the 1,000", "--max-runs 10000")


def test_a_workbook_declaring_millions_of_rows_is_refused_before_loading(tmp_path):
    dims = lambda xml: re.sub(r'<dimension ref="[^"]*"\s*/>', '<dimension ref="A1:J3000000"/>', xml)
    path = tmp_path / "runs.xlsx"
    path.write_bytes(_workbook(sheet_edit=dims))
    _plan_refused(tmp_path, HERE / "good_blend.toml", path, 4, "declares 3,000,000 rows and 10 columns",
                  "export the runs as CSV")


def test_a_workbook_whose_rows_run_past_the_limit_is_refused_while_streaming(tmp_path, monkeypatch):
    # the declared dimension says 11 rows; the sheet holds empty rows far below
    monkeypatch.setattr(settings, "MAX_SHEET_ROWS", 500)
    rows = lambda xml: xml.replace("</sheetData>", "".join(f'<row r="{k}"/>' for k in range(20, 900))
                                   + "</sheetData>")
    path = tmp_path / "runs.xlsx"
    path.write_bytes(_workbook(sheet_edit=rows))
    _plan_refused(tmp_path, HERE / "good_blend.toml", path, 4, "reaches past row 500")
    far = lambda xml: xml.replace("</sheetData>", '<row r="1048576"><c r="A1048576" t="inlineStr"><is><t>x</t>'
                                  "</is></c></row></sheetData>")
    path.write_bytes(_workbook(sheet_edit=far))
    _plan_refused(tmp_path, HERE / "good_blend.toml", path, 4, "reaches past row 500")


# ------------------------------------------------ 7. deep nesting
@pytest.mark.parametrize("rule", [
    "(" * 250 + "binder" + ")" * 250 + " <= 0.3",
    "-" * 300 + "binder <= 0.3",
    "binder <= " + "(" * 60 + "0.3" + ")" * 60,
])
def test_deeply_nested_rules_are_refused_by_name(tmp_path, rule):
    path = _protocol(tmp_path, GOOD_TOML.replace(RULE, f'rule = "{rule}"'))
    _refused(["check", path], 3, "constraints[0].rule", f"nest deeper than {settings.MAX_RULE_NESTING} levels")


def test_a_rule_nested_within_the_limit_still_reads():
    depth = settings.MAX_RULE_NESTING - 1
    (rule,) = parse_rule("(" * depth + "x" + ")" * depth + " <= 2")
    assert rule.coefs == (("x", 1.0),) and rule.rhs == 2.0
    with pytest.raises(RuleSyntaxError, match="nest deeper"):
        parse_rule("(" * (depth + 2) + "x" + ")" * (depth + 2) + " <= 2")


@pytest.mark.parametrize("depth, fragment", [
    (5000, "nest too deeply to read"),
    (40, "nest deeper than 16 levels"),
])
def test_deep_toml_arrays_are_refused(tmp_path, depth, fragment):
    text = GOOD_TOML.replace("seed = 11", "seed = 11\nx = " + "[" * depth + "]" * depth)
    _refused(["check", _protocol(tmp_path, text)], 3, "p.toml", fragment)


def test_a_deeply_nested_json_line_in_a_log_is_refused(tmp_path):
    log = tmp_path / "campaign" / "decisions.jsonl"
    log.parent.mkdir()
    log.write_text('{"a": ' + "[" * 100_000 + "]" * 100_000 + "}\n", encoding="utf-8")
    before = log.read_bytes()
    _refused(["verify", log], 5, "line 1 (record 0) nests arrays or objects too deeply")
    _refused(["plan", HERE / "good_blend.toml", HERE / "good_blend_runs.csv", "--out", log.parent], 5,
             "nests arrays or objects too deeply")
    assert log.read_bytes() == before
    assert sorted(p.name for p in log.parent.iterdir()) == ["decisions.jsonl"]


def test_read_input_refuses_by_the_callers_error_class(tmp_path):
    with pytest.raises(ProtocolError, match="it is a folder"):
        reading.read_input(tmp_path, what="protocol", error=ProtocolError, max_bytes=10)
    (tmp_path / "f").write_bytes(b"x" * 11)
    with pytest.raises(RunsDataError, match="more than 10 bytes"):
        reading.read_input(tmp_path / "f", what="runs", error=RunsDataError, max_bytes=10)
    assert reading.read_input(tmp_path / "f", what="runs", error=RunsDataError, max_bytes=11) == b"x" * 11
    with pytest.raises(VerificationError, match="it is a folder"):
        ledger.read_records(tmp_path)  # the log is read through the same function


def test_the_readme_exit_code_table_covers_these_refusals():
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    rows = re.findall(r"^\| (\d) \| ([^|]+)\|(?: ([^|]+)\|)?$", text, flags=re.M)
    by_code: dict[str, str] = {}
    for code, first, second in rows:
        by_code[code] = by_code.get(code, "") + first + (second or "")
    for code, words in {
        "3": ["not a regular file", "larger than 1 MiB", "nested deeper than 16", "not finite", "1e100",
              "nested deeper than 40", "changes the text direction", "case ignored", "single point"],
        "4": ["not a regular file", "64 MiB", "200,000 rows", "2,000,000 cells", "unit conversion", "run id",
              "--max-runs"],
        "5": ["not a regular file", "512 MiB", "nested too deeply"],
    }.items():
        for w in words:
            assert w in by_code[code], (code, w)
    assert f"default {settings.MAX_RUNS_DEFAULT:,}" in text
    assert f"{settings.MAX_SHEET_ROWS:,} rows" in text and f"{settings.MAX_SHEET_CELLS:,} cells" in text
