"""Atomic writes, file digests and spreadsheet-safe CSV output."""

from __future__ import annotations

import csv
import hashlib
import io
import os
import re
import stat

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from guardband.planner.app import fileio
from guardband.planner.errors import EXIT_IO, OutputError
from guardband.planner.app.fileio import (
    CSV_FORMULA_PREFIXES,
    atomic_write_bytes,
    atomic_write_many,
    atomic_write_text,
    csv_safe_cell,
    sha256_file,
    write_csv_text,
)


def _names(folder) -> set[str]:
    return set(os.listdir(folder))


def _fail(*args, **kwargs):
    raise OSError(28, "No space left on device")


# --------------------------------------------------------------------------
# atomic_write_bytes / atomic_write_text
# --------------------------------------------------------------------------


def test_atomic_write_creates_and_replaces(tmp_path):
    target = tmp_path / "plan.csv"
    atomic_write_bytes(target, b"first")
    assert target.read_bytes() == b"first"
    atomic_write_bytes(str(target), bytearray(b"second, longer content"))
    assert target.read_bytes() == b"second, longer content"
    assert _names(tmp_path) == {"plan.csv"}


def test_atomic_write_keeps_existing_permissions(tmp_path):
    target = tmp_path / "log.jsonl"
    target.write_bytes(b"old")
    os.chmod(target, 0o640)
    atomic_write_bytes(target, b"new")
    assert stat.S_IMODE(os.stat(target).st_mode) == 0o640


def test_new_file_is_not_private_to_the_temp_file_mode(tmp_path):
    # mkstemp creates 0o600; the written file gets the usual 0o666 & ~umask.
    target = tmp_path / "report.html"
    atomic_write_bytes(target, b"x")
    assert stat.S_IMODE(os.stat(target).st_mode) == 0o666 & ~fileio._UMASK


@pytest.mark.parametrize("broken", ["replace", "fsync"], ids=["os.replace", "os.fsync"])
def test_failed_write_leaves_old_file_whole_and_no_temp_file(tmp_path, monkeypatch, broken):
    target = tmp_path / "plan.csv"
    target.write_bytes(b"old content\n")
    monkeypatch.setattr(fileio.os, broken, _fail)
    with pytest.raises(OutputError) as info:
        atomic_write_bytes(target, b"new content that must not appear\n")
    message = str(info.value)
    assert str(target) in message
    assert "No space left on device" in message
    assert info.value.exit_code == EXIT_IO
    assert target.read_bytes() == b"old content\n"
    assert _names(tmp_path) == {"plan.csv"}


def test_interrupt_during_write_removes_temp_file(tmp_path, monkeypatch):
    target = tmp_path / "plan.csv"
    target.write_bytes(b"old")

    def interrupt(fd):
        raise KeyboardInterrupt

    monkeypatch.setattr(fileio.os, "fsync", interrupt)
    with pytest.raises(KeyboardInterrupt):
        atomic_write_bytes(target, b"new")
    assert target.read_bytes() == b"old"
    assert _names(tmp_path) == {"plan.csv"}


def test_missing_folder_is_an_output_error(tmp_path):
    target = tmp_path / "no_such_folder" / "plan.csv"
    with pytest.raises(OutputError, match=re.escape(f"could not write {target}")):
        atomic_write_bytes(target, b"x")


def test_atomic_write_refuses_text_for_bytes(tmp_path):
    with pytest.raises(TypeError, match="use atomic_write_text"):
        atomic_write_bytes(tmp_path / "a.txt", "text")  # type: ignore[arg-type]


def test_atomic_write_text_writes_exact_encoding(tmp_path):
    target = tmp_path / "note.txt"
    text = "Dissolution ≥ 80 %\r\nline two\n"
    atomic_write_text(target, text)
    assert target.read_bytes() == text.encode("utf-8")  # no newline translation
    atomic_write_text(target, "é", encoding="latin-1")
    assert target.read_bytes() == b"\xe9"


# --------------------------------------------------------------------------
# atomic_write_many
# --------------------------------------------------------------------------


def test_write_many_writes_every_file(tmp_path):
    files = {tmp_path / "a.csv": b"A", tmp_path / "b.json": "{\"b\": \"β\"}"}
    written = atomic_write_many(files)
    assert written == [str(p) for p in files]
    assert (tmp_path / "a.csv").read_bytes() == b"A"
    assert (tmp_path / "b.json").read_text(encoding="utf-8") == "{\"b\": \"β\"}"
    assert _names(tmp_path) == {"a.csv", "b.json"}


def test_write_many_failure_while_staging_changes_nothing(tmp_path, monkeypatch):
    a, b = tmp_path / "a.csv", tmp_path / "b.csv"
    a.write_bytes(b"old a")
    b.write_bytes(b"old b")
    real_fsync = os.fsync
    calls = []

    def fsync_fails_second_time(fd):
        calls.append(fd)
        if len(calls) == 2:
            _fail()
        real_fsync(fd)

    monkeypatch.setattr(fileio.os, "fsync", fsync_fails_second_time)
    with pytest.raises(OutputError, match=re.escape(f"could not write {b}")):
        atomic_write_many({a: b"new a", b: b"new b"})
    assert a.read_bytes() == b"old a"
    assert b.read_bytes() == b"old b"
    assert _names(tmp_path) == {"a.csv", "b.csv"}


def test_write_many_failed_rename_reports_what_changed(tmp_path, monkeypatch):
    a, b = tmp_path / "a.csv", tmp_path / "b.csv"
    a.write_bytes(b"old a")
    b.write_bytes(b"old b")
    real_replace = os.replace

    def replace_fails_for_b(src, dst):
        if os.fspath(dst) == str(b):
            _fail()
        real_replace(src, dst)

    monkeypatch.setattr(fileio.os, "replace", replace_fails_for_b)
    with pytest.raises(OutputError) as info:
        atomic_write_many({a: b"new a", b: b"new b"})
    message = str(info.value)
    assert f"Already replaced: {a}" in message
    assert f"Unchanged: {b}" in message
    # Documented: each file is atomic, the set is not.
    assert a.read_bytes() == b"new a"
    assert b.read_bytes() == b"old b"
    assert _names(tmp_path) == {"a.csv", "b.csv"}


def test_write_many_refuses_the_same_file_twice(tmp_path):
    with pytest.raises(ValueError, match="listed twice"):
        atomic_write_many({tmp_path / "a": b"1", str(tmp_path / "." / "a"): b"2"})
    assert _names(tmp_path) == set()


# --------------------------------------------------------------------------
# sha256_file
# --------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("content", "digest"),
    [
        # FIPS 180-2, appendix B.1 example "abc" (published digest, from memory).
        (b"abc", "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"),
        # SHA-256 of the empty message (from memory; widely quoted).
        (b"", "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"),
    ],
    ids=["abc", "empty"],
)
def test_sha256_file_known_digests(tmp_path, content, digest):
    path = tmp_path / "f"
    path.write_bytes(content)
    assert sha256_file(path) == digest


def test_sha256_file_matches_hashlib_across_chunks(tmp_path):
    data = np.random.default_rng(0).bytes(3 * (1 << 20) + 17)  # crosses chunk edges
    path = tmp_path / "big.bin"
    path.write_bytes(data)
    assert sha256_file(str(path)) == hashlib.sha256(data).hexdigest()  # reference library


# --------------------------------------------------------------------------
# csv_safe_cell
# --------------------------------------------------------------------------

# OWASP "CSV Injection" (from memory): cells must not begin with = + - @,
# tab (0x09) or carriage return (0x0D); prepend a single quote.
# OWASP ASVS 5.0, requirement 1.2.10 (published, secondary copy): also NUL.
OWASP_PREFIXES = ["=", "+", "-", "@", "\t", "\r", "\0"]


def test_formula_prefixes_are_the_owasp_list():
    assert sorted(CSV_FORMULA_PREFIXES) == sorted(OWASP_PREFIXES)


@pytest.mark.parametrize(
    "text",
    ["=1+2", "=cmd|' /C calc'!A0", "+41 22", "-2+3", "@SUM(A1:A9)", "\tx", "\r=1", "\0=1"],
    ids=["equals", "dde", "plus", "minus", "at", "tab", "cr", "nul"],
)
def test_dangerous_text_gets_a_leading_quote(text):
    assert csv_safe_cell(text) == "'" + text


@pytest.mark.parametrize(
    "text",
    ["lactose", "", "1-2", "a=b", "'=already quoted", " =x", "#note", "\n=1"],
    ids=["word", "empty", "inner-minus", "inner-equals", "quoted", "space", "hash", "lf"],
)
def test_other_text_is_unchanged(text):
    # Only the first character matters in the OWASP advice; a line feed is
    # not in its list (csv quoting keeps it inside the cell).
    assert csv_safe_cell(text) == text


@pytest.mark.parametrize(
    "value",
    [-1.5, -7, 0, np.float64(-2.0), np.float32(-0.5), np.int64(-3), True, np.bool_(False), None],
    ids=["float", "int", "zero", "np.float64", "np.float32", "np.int64", "bool", "np.bool_", "None"],
)
def test_numbers_stay_numbers(value):
    assert csv_safe_cell(value) is value


def test_numeric_looking_text_is_still_text():
    # Our writers pass numbers as numbers, so a str is always real text.
    assert csv_safe_cell("-1.5") == "'-1.5"
    assert csv_safe_cell(np.str_("=A1")) == "'=A1"
    assert type(csv_safe_cell(np.str_("=A1"))) is str


def test_other_objects_are_escaped_as_their_text():
    class Formula:
        def __str__(self):
            return "=HYPERLINK(\"x\")"

    assert csv_safe_cell(Formula()) == "'=HYPERLINK(\"x\")"


# --------------------------------------------------------------------------
# write_csv_text
# --------------------------------------------------------------------------


def _parse(text: str, n_comments: int = 0) -> tuple[list[str], list[list[str]]]:
    # Split off exactly the leading comment lines (a quoted cell may itself
    # contain a line starting with "#").
    parts = text.split("\n", n_comments)
    comments, body = parts[:n_comments], parts[n_comments]
    return comments, list(csv.reader(io.StringIO(body, newline="")))


def test_csv_round_trip_with_comments_and_quoting():
    rows = [
        ["A-1", 0.1 + 0.2, 3, "lactose, anhydrous"],
        ["=2+3", -1e-300, np.int64(-4), 'say "hi"\nnext line'],
    ]
    text = write_csv_text(rows, ["run", "fraction", "n", "note"], comment_lines=["c1", "c2"])
    assert "\r" not in text
    comments, table = _parse(text, 2)
    assert comments == ["# c1", "# c2"]
    assert table[0] == ["run", "fraction", "n", "note"]
    assert table[1] == ["A-1", repr(0.1 + 0.2), "3", "lactose, anhydrous"]
    assert table[2] == ["'=2+3", "-1e-300", "-4", 'say "hi"\nnext line']
    # repr is the shortest text that reads back as the same float.
    assert float(table[1][1]) == 0.1 + 0.2
    assert float(table[2][1]) == -1e-300


def test_csv_float_format_and_float32():
    text = write_csv_text([[1 / 3, np.float32(0.1)]], ["x", "y"], float_format=".10g")
    assert text.splitlines()[1] == "0.3333333333,0.1000000015"
    # Without a format, float32 keeps its own shortest digits, not float64 noise.
    assert write_csv_text([[np.float32(0.1)]], ["y"]).splitlines()[1] == "0.1"


def test_csv_comment_with_line_break_cannot_reach_the_data():
    text = write_csv_text([[1]], ["x"], comment_lines=["first\n=evil,2", ""])
    assert text.splitlines()[:3] == ["# first", "# =evil,2", "#"]
    _, table = _parse(text, 3)
    assert table == [["x"], ["1"]]


def test_csv_header_and_mapping_rows():
    text = write_csv_text([{"-dose": 2.5}, {"note": "@x"}], ["-dose", "note"])
    _, table = _parse(text)
    assert table == [["'-dose", "note"], ["2.5", ""], ["", "'@x"]]


def test_csv_row_width_is_checked():
    with pytest.raises(ValueError, match=re.escape("row 2 has 1 cells but the header has 2 columns (1 != 2)")):
        write_csv_text([[1, 2], [3]], ["a", "b"])
    with pytest.raises(ValueError, match="row 1 has columns that are not in the header"):
        write_csv_text([{"c": 1}], ["a", "b"])


@settings(max_examples=200, deadline=None)
@given(st.lists(st.lists(st.text(max_size=12), min_size=2, max_size=2), max_size=6))
def test_no_cell_of_the_output_starts_a_formula(rows):
    # Safety property over many cases: after parsing the CSV back, no cell
    # starts with a formula character, and each cell is the escaped input.
    text = write_csv_text(rows, ["a", "b"])
    _, table = _parse(text)
    assert table[0] == ["a", "b"]
    parsed = table[1:]
    assert len(parsed) == len(rows)
    for got, given_row in zip(parsed, rows):
        assert got == [csv_safe_cell(cell) for cell in given_row]
        assert not any(cell.startswith(tuple(OWASP_PREFIXES)) for cell in got)


def test_csv_quotes_a_bare_carriage_return():
    # Found by the property test above: the csv module alone leaves "\r"
    # unquoted when rows end in "\n", and a reader then splits the row.
    assert write_csv_text([["x\ry", 1]], ["a", "b"]) == 'a,b\n"x\ry",1\n'


def test_comment_pieces_after_separators_cannot_start_formulas():
    from guardband.planner.app.fileio import write_csv_text

    text = write_csv_text([[1]], ["a"], comment_lines=['title "x, =1+1; @SUM(A1)\t-2, +3, ok'])
    first = text.splitlines()[0]
    assert first == "# title 'x, '=1+1; '@SUM(A1)\t'-2, '+3, ok"
