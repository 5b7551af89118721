"""Every command's table output fits a 100-column terminal on the example protocols.

Full detail stays in the CSV and JSON outputs; the table format splits wide
tables into blocks (the row's name repeated) and wraps prose.
"""

from __future__ import annotations

import pytest
from typer.testing import CliRunner

from guardband.planner.app.textable import TERMINAL_WIDTH, format_cell, render_table, wrap_text
from guardband.planner.cli import app

from conftest import PROTOCOLS

EXAMPLES = ("tablet_blend", "dose_combination")


def _widest(text: str) -> int:
    return max((len(line) for line in text.splitlines()), default=0)


def test_a_wide_table_splits_into_blocks_that_keep_every_cell():
    header = ["run_id"] + [f"factor_{i:02d}" for i in range(20)]
    rows = [[f"R{k}"] + [1000.0 + k + i / 10 for i in range(20)] for k in range(3)]
    text = render_table(header, rows)
    assert _widest(text) <= TERMINAL_WIDTH
    for name in header[1:]:
        assert text.count(name) == 1  # every column once
    assert text.count("R1 ") + text.count("R1\n") >= 2  # the row's name in every block
    assert _widest(render_table(header, rows, width=None)) > TERMINAL_WIDTH


@pytest.mark.parametrize(("value", "text"), [
    (10000.0, "10000"),  # a stirrer at 10,000 rpm read "1e+04 rpm"
    (12345.6, "12346"), (99999.5, "100000"), (8384.16, "8384"), (-20000.0, "-20000"), (0.5, "0.5"),
    (0.12345, "0.1235"), (1234567.0, "1.235e+06"), (0.000123, "1.230e-04"), (0.0, "0"), (3, "3"),
])
def test_numbers_below_a_million_read_without_exponents(value, text):
    assert format_cell(value) == text


def test_prose_wraps_with_its_indent():
    line = "  - " + "word " * 60
    out = wrap_text(line)
    assert _widest(out) <= TERMINAL_WIDTH and out.split() == line.split()
    assert all(part.startswith("    ") for part in out.splitlines()[1:])


@pytest.fixture(scope="module")
def campaigns(tmp_path_factory):
    runner = CliRunner()
    out = {}
    for name in EXAMPLES:
        folder = tmp_path_factory.mktemp(name) / "campaign"
        res = runner.invoke(app, ["plan", str(PROTOCOLS / f"{name}.toml"), str(PROTOCOLS / f"{name}_runs.csv"),
                                  "--out", str(folder), "--pool", "400"], env={"GUARDBAND_OPERATOR": "width"})
        assert res.exit_code == 0, res.output
        out[name] = (folder, res.stdout)
    return out


@pytest.mark.parametrize("name", EXAMPLES)
def test_every_command_fits_a_100_column_terminal(name, campaigns, tmp_path):
    runner = CliRunner()
    folder, plan_stdout = campaigns[name]
    log = str(folder / "decisions.jsonl")
    outputs = {"plan": plan_stdout}
    for label, args in {
        "check": ["check", str(PROTOCOLS / f"{name}.toml")],
        "start": ["start", str(PROTOCOLS / f"{name}.toml"), "--runs", "6"],
        "verify": ["verify", log],
        "verify --summary": ["verify", log, "--summary"],
        "replay": ["replay", log, "--record", "0"],
    }.items():
        res = runner.invoke(app, args, env={"GUARDBAND_OPERATOR": "width"})
        assert res.exit_code == 0, (label, res.output)
        outputs[label] = res.stdout
    for label, text in outputs.items():
        assert text.strip(), label
        assert _widest(text) <= TERMINAL_WIDTH, (label, max(text.splitlines(), key=len))
