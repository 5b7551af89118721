"""Spreadsheets in and out: .xlsx runs files, and exports a spreadsheet cannot run.

Workbooks are made here with openpyxl. A workbook and the CSV it was made
from must give the same runs table (two paths that must agree).
"""

from __future__ import annotations

import csv
import io
import re
import zipfile
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from guardband.planner.cli import app
from guardband.planner.errors import RunsDataError
from guardband.planner.app.fileio import CSV_FORMULA_PREFIXES
from guardband.planner.inputs.protocol import load_protocol
from guardband.planner.inputs.runs import read_runs, read_runs_bytes
from guardband.safety import ledger

openpyxl = pytest.importorskip("openpyxl")

HERE = Path(__file__).resolve().parent / "bad_inputs"
PROTOCOL_PATH = HERE / "good_blend.toml"
RUNS_CSV = HERE / "good_blend_runs.csv"
PROTOCOL = load_protocol(PROTOCOL_PATH)
runner = CliRunner()


def csv_rows() -> list[list[str]]:
    return list(csv.reader(io.StringIO(RUNS_CSV.read_text(encoding="utf-8"))))


def workbook_bytes(rows, *, title="Sheet1", first_sheet=None, as_text=False, edit=None) -> bytes:
    wb = openpyxl.Workbook()
    ws = wb.active
    if first_sheet is not None:
        ws.title = first_sheet
        ws["A1"] = "instructions for the lab"
        ws = wb.create_sheet(title)
    else:
        ws.title = title
    for i, row in enumerate(rows):
        if i == 0 or as_text:
            ws.append(row)
        else:
            ws.append([row[0], *[float(c) for c in row[1:9]], row[9]])
    if edit is not None:
        edit(ws)
    buf = io.BytesIO()
    wb.save(buf)
    return buf.getvalue()


def with_saved_result(raw: bytes, formula: str, value: str) -> bytes:
    """Give a formula cell the saved result a spreadsheet program would store.

    openpyxl writes formulas without results (``<f>..</f><v />``); this
    fills in ``<v>`` in the sheet XML, as a program that calculated would.
    """
    src = zipfile.ZipFile(io.BytesIO(raw))
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as dst:
        for item in src.infolist():
            data = src.read(item.filename)
            if item.filename.startswith("xl/worksheets/sheet"):
                old = f"<f>{formula}</f><v />".encode()
                assert old in data
                data = data.replace(old, f"<f>{formula}</f><v>{value}</v>".encode())
            dst.writestr(item, data)
    return out.getvalue()


def read(raw: bytes, **kw):
    return read_runs_bytes(raw, PROTOCOL, source="runs.xlsx", **kw)


# ------------------------------------------------------------------ reading
def test_workbook_and_csv_give_the_same_table():
    from_csv = read_runs(RUNS_CSV, PROTOCOL)
    from_xlsx = read(workbook_bytes(csv_rows()))
    assert from_xlsx.run_ids == from_csv.run_ids
    np.testing.assert_array_equal(from_xlsx.X, from_csv.X)
    for name in PROTOCOL.response_names:
        np.testing.assert_array_equal(from_xlsx.Y[name], from_csv.Y[name])
    assert from_xlsx.notes == from_csv.notes


def test_numbers_stored_as_text_are_trimmed_and_read():
    rows = [[f"  {c} " for c in r] for r in csv_rows()]  # every cell text, with spaces
    table = read(workbook_bytes(rows, as_text=True))
    np.testing.assert_array_equal(table.X, read_runs(RUNS_CSV, PROTOCOL).X)
    assert table.run_ids[0] == "C01"


def test_blank_rows_at_the_end_are_dropped_but_not_in_the_middle():
    def tail(ws):
        for r in range(12, 40):
            ws.cell(row=r, column=1, value=None)
        ws.cell(row=40, column=2, value="   ")
    assert read(workbook_bytes(csv_rows(), edit=tail)).n_runs == 10

    def gap(ws):
        ws.insert_rows(4)
    with pytest.raises(RunsDataError, match=re.escape("row 4: the row is blank; delete it")):
        read(workbook_bytes(csv_rows(), edit=gap))


def test_formula_with_a_saved_result_is_read_as_its_number():
    raw = workbook_bytes(csv_rows(), edit=lambda ws: ws.__setitem__("E3", "=E2-8.94"))
    with pytest.raises(RunsDataError, match=re.escape("column force (Sheet1!E3): the cell holds a formula (=E2-8.94) with no saved result")):
        read(raw)
    table = read(with_saved_result(raw, "E2-8.94", "7.48"))
    assert table.X[1, 3] == 7.48


def test_sheet_option_and_cell_names_with_a_quoted_sheet_title():
    raw = workbook_bytes(csv_rows(), title="Lab runs", first_sheet="Notes")
    assert read(raw, sheet="Lab runs").n_runs == 10
    with pytest.raises(RunsDataError, match="missing column 'run_id'"):
        read(raw)  # the first sheet is the notes
    bad = workbook_bytes(csv_rows(), title="Lab runs", edit=lambda ws: ws.__setitem__("D4", "high"))
    with pytest.raises(RunsDataError, match=re.escape("row 4 (run C03), column disintegrant ('Lab runs'!D4): 'high' is not a number")):
        read(bad)


def test_every_cell_problem_is_reported_together_with_its_cell():
    def damage(ws):
        ws["B2"] = "=1/0"
        ws["C3"] = "#N/A"
        ws["G4"] = True
        ws["H5"] = "<0.05"
    with pytest.raises(RunsDataError) as info:
        read(workbook_bytes(csv_rows(), edit=damage))
    text = str(info.value)
    assert text.startswith("runs.xlsx: 4 problems found")
    for ref in ("Sheet1!B2", "Sheet1!C3", "Sheet1!G4", "Sheet1!H5"):
        assert ref in text


def test_header_units_in_a_workbook_are_converted():
    rows = csv_rows()
    rows[0][5] = "api_mass [g]"
    for r in rows[1:]:
        r[5] = str(float(r[5]) / 1000)
    table = read(workbook_bytes(rows))
    np.testing.assert_allclose(table.X[:, 4], read_runs(RUNS_CSV, PROTOCOL).X[:, 4], rtol=1e-12)
    assert any("values converted [g] -> [mg] (x 1000)" in f for f in table.flags)


def test_leading_comment_rows_are_skipped_and_counted():
    rows = [["# Guardband starting design - x", "more"], ["# CAUTIONS:"]] + csv_rows()
    raw = workbook_bytes([rows[0]] + [rows[1]] + rows[2:], as_text=True)
    table = read(raw)
    assert table.n_runs == 10
    bad = workbook_bytes(rows, as_text=True, edit=lambda ws: ws.__setitem__("E5", "x"))
    with pytest.raises(RunsDataError, match=re.escape("row 5 (run C02), column force (Sheet1!E5)")):
        read(bad)


# ------------------------------------------------------------------ plan and replay
def test_plan_from_a_named_sheet_records_it_and_replays_identically(tmp_path):
    book = tmp_path / "runs.xlsx"
    book.write_bytes(workbook_bytes(csv_rows(), title="Lab runs", first_sheet="Notes"))
    out = tmp_path / "campaign"
    res = runner.invoke(app, ["plan", str(PROTOCOL_PATH), str(book), "--out", str(out),
                              "--sheet", "Lab runs", "--seed", "3"])
    assert res.exit_code == 0, res.output
    copies = list((out / "inputs").glob("runs-*"))
    assert len(copies) == 1 and copies[0].suffix == ".xlsx"
    assert copies[0].read_bytes() == book.read_bytes()
    body = ledger.read_records(out / "decisions.jsonl")[0]["body"]
    assert body["runs_file"]["read_options"] == {"delimiter": None, "decimal": None, "sheet": "Lab runs"}
    res = runner.invoke(app, ["replay", str(out / "decisions.jsonl"), "--record", "0"])
    assert res.exit_code == 0, res.output
    assert "identical" in res.stdout


# ------------------------------------------------------------------ exports
INJECT_PROTOCOL = """
seed = 4

[study]
title = "Injection check"
version = "1"
author = "tests"

[[factors]]
name = "=cmd"
kind = "continuous"
lower = -10
upper = -1
unit = "kN"

[[factors]]
name = "@x"
kind = "continuous"
lower = 0
upper = 1

[objective]
name = "+score"
direction = "maximize"

[[limits]]
name = "-tox"
upper = 0.5
probability = 0.9

[screen]
threshold = 0.8
min_runs = 3

[batch]
size = 2
pool = 100
refine = 0

[model]
restarts = 1
"""

INJECT_RUNS = """run_id,=cmd,@x,+score,-tox
=R1,-9,0.1,1.0,0.10
+R2,-7,0.5,2.0,0.20
-R3,-5,0.9,1.5,0.15
@R4,-3,0.3,2.5,0.25
R5,-2,0.7,2.2,0.30
"""


def cells_of(path: Path) -> list[list[str]]:
    lines = [ln for ln in path.read_text(encoding="utf-8").splitlines() if not ln.startswith("#")]
    return list(csv.reader(io.StringIO("\n".join(lines))))


def is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def assert_spreadsheet_safe(rows: list[list[str]]) -> None:
    for row in rows:
        for cell in row:
            if cell.startswith(CSV_FORMULA_PREFIXES):
                assert is_number(cell), f"unescaped text cell {cell!r}"


def test_plan_exclusion_and_start_outputs_escape_formula_text_and_keep_numbers(tmp_path):
    protocol = tmp_path / "inject.toml"
    protocol.write_text(INJECT_PROTOCOL, encoding="utf-8")
    runs = tmp_path / "runs.csv"
    runs.write_text(INJECT_RUNS, encoding="utf-8")
    out = tmp_path / "campaign"
    res = runner.invoke(app, ["plan", str(protocol), str(runs), "--out", str(out)])
    assert res.exit_code == 0, res.output
    plan = cells_of(next(out.glob("plan-*.csv")))
    excl = cells_of(next(out.glob("exclusions-*.csv")))
    # OWASP CSV injection advice: a leading quote on text cells that start with = + - @
    assert plan[0][2:4] == ["'=cmd", "'@x"] and "'+score_mean" in plan[0]
    assert excl[0][5:7] == ["'=cmd", "'@x"]
    assert_spreadsheet_safe(plan)
    assert_spreadsheet_safe(excl)
    # the negative factor values stay numbers, unquoted
    values = [float(r[2]) for r in plan[1:]] + [float(r[5]) for r in excl[1:]]
    assert values and all(-10 - 1e-9 <= v <= -1 + 1e-9 for v in values)

    start = tmp_path / "start.csv"
    res = runner.invoke(app, ["start", str(protocol), "--runs", "4", "--out", str(start)])
    assert res.exit_code == 0, res.output
    rows = cells_of(start)
    assert rows[0][:3] == ["run_id", "'=cmd", "'@x"]
    assert_spreadsheet_safe(rows)
    # and the escaped header reads back as the protocol's names
    table = read_runs(start, load_protocol(protocol))
    assert table.n_runs == 4 and bool(table.pending.all())


def test_run_ids_that_look_like_formulas_are_kept_verbatim_as_data(tmp_path):
    protocol = tmp_path / "inject.toml"
    protocol.write_text(INJECT_PROTOCOL, encoding="utf-8")
    runs = tmp_path / "runs.csv"
    runs.write_text(INJECT_RUNS, encoding="utf-8")
    table = read_runs(runs, load_protocol(protocol))
    assert table.run_ids[:4] == ("=R1", "+R2", "-R3", "@R4")


def test_comment_lines_cannot_carry_a_formula_into_a_spreadsheet():
    # a spreadsheet splits our "# ..." lines at commas; no piece may start a formula
    from guardband.planner.app.fileio import write_csv_text

    text = write_csv_text([[1.0]], ["a"], comment_lines=["Guardband plan - Blend A,=1+1"])
    # what a spreadsheet sees: every line split at the delimiter
    assert_spreadsheet_safe(list(csv.reader(io.StringIO(text))))


# ------------------------------------------------------------------ CSV as labs export it
def _plain_table():
    return read_runs(RUNS_CSV, PROTOCOL)


def _variants() -> dict[str, tuple[bytes, dict]]:
    text = RUNS_CSV.read_text(encoding="utf-8")
    semi = text.replace(",", ";").replace(".", ",")
    lines = text.splitlines()
    spaced = "\n".join([",".join(f" {h}\u00a0" for h in lines[0].split(","))] + lines[1:]) + "\n"
    return {
        "utf8-bom": (b"\xef\xbb\xbf" + text.encode(), {}),
        "crlf-and-blank-tail": ((text.replace("\n", "\r\n") + ",,,,,,,,,\r\n\r\n").encode(), {}),
        "excel-semicolon-decimal-comma": (semi.encode(), {}),
        "excel-sep-line": (("sep=;\n" + semi).encode(), {}),
        "stated-semicolon-and-comma": (semi.encode(), {"delimiter": ";", "decimal": ","}),
        "excel-unicode-text": (text.replace(",", "\t").encode("utf-16"), {}),  # UTF-16 with BOM, tabs
        "tab-stated": (text.replace(",", "\t").encode(), {"delimiter": "tab"}),
        "header-spaces-and-nbsp": (spaced.encode(), {}),
        "comment-lines": (("# exported by the lab\n# 2026-03-01\n" + text).encode(), {}),
    }


@pytest.mark.parametrize("name", sorted(_variants()))
def test_lab_exports_read_as_the_plain_csv(name):
    raw, options = _variants()[name]
    table = read_runs_bytes(raw, PROTOCOL, source="runs.csv", **options)
    plain = _plain_table()
    assert table.run_ids == plain.run_ids
    np.testing.assert_array_equal(table.X, plain.X)
    for r in PROTOCOL.response_names:
        np.testing.assert_array_equal(table.Y[r], plain.Y[r])


def test_a_wrongly_stated_delimiter_is_reported_not_guessed(tmp_path):
    res = runner.invoke(app, ["plan", str(PROTOCOL_PATH), str(RUNS_CSV), "--out", str(tmp_path / "c"),
                              "--delimiter", ";"])
    assert res.exit_code == 4
    assert "column A: unknown column 'run_id,filler,binder" in res.stderr
    assert not (tmp_path / "c").exists()
