"""Every CSV table the command line writes opens with ``pandas.read_csv`` as it is, and keeps its cautions.

For both example protocols, every command that writes a CSV table (to a
file or to stdout) is run, and each table is read with pandas' default
settings (no ``comment=``, no ``skiprows=``). The cautions of
``guardband.safety.cautions`` must travel with each table: in its
``cautions`` column (tables of runs and recipes), in its ``.notes.txt``
companion file (written tables), or on stderr (tables on stdout). Dropping
them from any of these places fails a test here.
"""

from __future__ import annotations

import io
import json
from pathlib import Path

import pandas as pd
import pytest
from typer.testing import CliRunner

from guardband.planner.app.fileio import (CAUTIONS_COLUMN, notes_path, notes_text, split_comment_lines,
                                         with_cautions_column, write_csv_text)
from guardband.planner.cli import app
from guardband.safety.cautions import cautions_for

from conftest import PROTOCOLS

EXAMPLES = {"tablet_blend": "formulation", "dose_combination": "dose"}
PROBLEM = {"tablet_blend": "tablet", "dose_combination": "dose"}
FAST = ("--pool", 200)


def run(*args):
    res = CliRunner().invoke(app, [str(a) for a in args], catch_exceptions=False)
    assert res.exit_code == 0, res.stdout + res.stderr
    return res


def read(source) -> pd.DataFrame:
    """A table as pandas reads it with its default settings."""
    return pd.read_csv(io.StringIO(source) if isinstance(source, str) else source)


def assert_cautions_column(frame: pd.DataFrame, kind: str) -> None:
    assert frame.columns[-1] == CAUTIONS_COLUMN
    assert len(frame) > 0
    assert (frame[CAUTIONS_COLUMN] == " ".join(cautions_for(kind))).all()


def assert_cautions_in(text: str, kind: str) -> None:
    for caution in cautions_for(kind):
        assert caution in text, caution


def assert_notes_file(table: Path, kind: str) -> str:
    notes = Path(notes_path(table))
    assert notes.name == table.stem + ".notes.txt"
    text = notes.read_text(encoding="utf-8")
    assert_cautions_in(text, kind)
    return text


@pytest.fixture(scope="module", params=sorted(EXAMPLES))
def example(request, tmp_path_factory):
    """One example's start design, campaign (plan, judge of the start design's runs) and stdout tables."""
    name = request.param
    kind = EXAMPLES[name]
    tmp = tmp_path_factory.mktemp(name)
    protocol, runs = PROTOCOLS / f"{name}.toml", PROTOCOLS / f"{name}_runs.csv"
    camp = tmp / "campaign"
    out = {"kind": kind, "tmp": tmp, "camp": camp, "protocol": protocol}
    out["start"] = run("start", protocol, "--runs", 3, "--seed", 2, "--out", tmp / "start.csv", "--format", "csv")
    out["plan"] = run("plan", protocol, runs, "--out", camp, *FAST, "--by", "tests", "--format", "csv")
    # the starting design, as written, is a table of recipes for judge
    out["judge"] = run("judge", protocol, runs, tmp / "start.csv", "--out", camp, "--by", "tests",
                       "--format", "csv")
    out["check"] = run("check", protocol, "--format", "csv")
    out["verify"] = run("verify", camp / "decisions.jsonl", "--format", "csv")
    out["summary"] = run("verify", camp / "decisions.jsonl", "--summary", "--format", "csv")
    out["replay"] = run("replay", camp / "decisions.jsonl", "--record", 0, "--format", "csv")
    out["simulate"] = run("simulate", protocol, "--problem", PROBLEM[name], "--strategies", "protocol",
                          "--seeds", 1, "--budget", 1, *FAST, "--out", tmp / "simulated.csv", "--format", "csv")
    out["records"] = [json.loads(line) for line in (camp / "decisions.jsonl").read_text().splitlines()]
    return out


def assert_printed_alike(res, table, kind):
    """A command's ``--format csv`` stdout is the written table; its notes and cautions go to stderr."""
    assert read(res.stdout).equals(table)
    assert_cautions_in(res.stderr, kind)


def test_the_starting_design_file_and_stdout(example):
    kind, tmp = example["kind"], example["tmp"]
    written = read(tmp / "start.csv")
    assert list(written["run_id"]) == ["S01", "S02", "S03"]
    assert_cautions_column(written, kind)
    assert "fill in the response columns" in assert_notes_file(tmp / "start.csv", kind)
    assert_printed_alike(example["start"], written, kind)


def test_the_plan_and_exclusion_tables_and_their_notes(example):
    kind, camp = example["kind"], example["camp"]
    body = example["records"][0]["body"]
    plan = read(camp / body["plan_table"]["file"])
    assert len(plan) == len(body["proposals"]) > 0
    assert_cautions_column(plan, kind)
    notes = assert_notes_file(camp / body["plan_table"]["file"], kind)
    assert body["plan_notes"]["file"] == Path(notes_path(body["plan_table"]["file"])).name
    assert "protocol fingerprint " + body["protocol_fingerprint"] in notes
    assert "why rank 1:" in notes
    excl = read(camp / body["exclusion_table"]["file"])
    assert len(excl) == sum(body["counts"].values())
    assert_cautions_column(excl, kind)
    assert_notes_file(camp / body["exclusion_table"]["file"], kind)
    assert_printed_alike(example["plan"], plan, kind)


def test_the_judge_table_and_its_notes(example):
    kind, camp = example["kind"], example["camp"]
    body = example["records"][1]["body"]
    table = read(camp / body["judge_table"]["file"])
    assert list(table["recipe"]) == list(read(example["tmp"] / "start.csv")["run_id"])
    assert_cautions_column(table, kind)
    assert_notes_file(camp / body["judge_table"]["file"], kind)
    assert_printed_alike(example["judge"], table, kind)


def test_the_log_tables_on_stdout(example):
    kind = example["kind"]
    assert read(example["verify"].stdout)["ok"].tolist() == [True]
    assert read(example["replay"].stdout)["identical"].tolist() == [True]
    summary = read(example["summary"].stdout)
    assert summary["kind"].tolist() == ["plan"]  # one row per planning step (and per correction)
    assert_cautions_in(example["summary"].stderr, kind)


def test_the_check_table_on_stdout(example):
    factors = read(example["check"].stdout)
    assert len(factors) >= 2 and "reach_low" in factors.columns
    assert_cautions_in(example["check"].stderr, example["kind"])


def test_the_simulation_table_file_and_stdout(example):
    kind, tmp = example["kind"], example["tmp"]
    written = read(tmp / "simulated.csv")
    assert len(written) > 0 and "strategy" in written.columns
    assert_notes_file(tmp / "simulated.csv", kind)
    res = example["simulate"]
    assert read(res.stdout).equals(written)
    assert_cautions_in(res.stderr, kind)


def test_a_sweep_folder_holds_plain_tables_with_notes(tmp_path):
    out = tmp_path / "sweep"
    run("simulate", PROTOCOLS / "tablet_blend.toml", "--problem", "tablet", "--vary", "threshold=0.9,0.95",
        "--seeds", 1, "--budget", 1, *FAST, "--out-dir", out)
    tables = sorted(out.glob("*.csv"))
    assert [t.name for t in tables][-2:] == ["sweep-calibration.csv", "sweep.csv"] and len(tables) == 4
    for table in tables:
        assert len(read(table)) > 0
        assert_notes_file(table, "formulation")


@pytest.mark.slow
def test_the_report_table_on_stdout(tmp_path):
    camp = tmp_path / "dose"
    run("plan", PROTOCOLS / "dose_combination.toml", PROTOCOLS / "dose_combination_runs.csv", "--out", camp,
        "--by", "tests")
    frame = read(run("report", camp, "--format", "csv").stdout)
    assert frame["record"].tolist() == [0] and frame["report"][0].endswith(".html")


# ------------------------------------------------------------- the helpers
def test_notes_path_replaces_the_last_suffix_and_never_names_the_table_itself():
    assert notes_path("campaign/plan-1a2b.csv") == "campaign/plan-1a2b.notes.txt"
    assert notes_path("runs") == "runs.notes.txt"
    assert notes_path("x.notes.txt") == "x.notes.notes.txt"
    assert notes_path(".csv") == ".csv.notes.txt"


def test_notes_text_lists_the_notes_then_the_cautions():
    text = notes_text(["title", "two\nlines"], ("First.", "Second."))
    assert text == "title\ntwo\nlines\nCAUTIONS:\n- First.\n- Second.\n"
    assert notes_text(["CAUTION: in the notes already"], ()) == "CAUTION: in the notes already\n"


def test_the_cautions_column_is_appended_to_every_row_without_changing_the_inputs():
    header, rows = ["a", "b"], [[1, 2], [3, 4]]
    new_header, new_rows = with_cautions_column(header, rows, ("One.", "Two."))
    assert new_header == ["a", "b", "cautions"] and new_rows == [[1, 2, "One. Two."], [3, 4, "One. Two."]]
    assert header == ["a", "b"] and rows == [[1, 2], [3, 4]]
    with pytest.raises(ValueError, match="already has a column 'cautions'"):
        with_cautions_column(["cautions"], [], ("x",))


def test_split_comment_lines_gives_back_the_notes_and_a_plain_table():
    text = write_csv_text([[1, "a,b"]], ["x", "y"], comment_lines=["first", "CAUTION: second"])
    notes, table = split_comment_lines(text)
    assert notes == ["first", "CAUTION: second"]
    assert table == 'x,y\n1,"a,b"\n'
    assert read(table).shape == (1, 2)


def test_a_runs_file_with_a_cautions_column_reads_as_one_without_it():
    from guardband.planner.inputs.protocol import load_protocol
    from guardband.planner.inputs.runs import parse_runs_text

    p = load_protocol(PROTOCOLS / "tablet_blend.toml")
    plain = (PROTOCOLS / "tablet_blend_runs.csv").read_text()
    lines = plain.splitlines()
    with_column = "\n".join([lines[0] + ",cautions"] + [ln + ",Decision support only." for ln in lines[1:]])
    a, b = parse_runs_text(plain, p), parse_runs_text(with_column, p)
    assert a.run_ids == b.run_ids and (a.X == b.X).all() and a.notes == b.notes


def test_a_protocol_may_not_name_a_factor_cautions():
    from guardband.planner.errors import ProtocolError
    from guardband.planner.inputs.protocol import parse_protocol

    from conftest import unit_square_protocol

    data = unit_square_protocol({"name": "cautions", "upper": 1.0, "probability": 0.9}, screen={"threshold": 0.9})
    with pytest.raises(ProtocolError, match="`run_id`, `notes` and `cautions` are reserved column names"):
        parse_protocol(data)
