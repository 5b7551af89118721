"""Planning from a notebook: DataFrames in and out, a short repr, the log when asked.

The README's Python example is executed as written (from the repository
root, in a temporary copy of the folders it reads).
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import guardband
from guardband.planner.errors import RunsDataError
from guardband.planner.inputs.protocol import load_protocol
from guardband.planner.inputs.runs import read_runs as read_runs_file
from guardband.planner.step import plan_step
from guardband.safety import ledger

from conftest import PROTOCOLS

ROOT = Path(__file__).resolve().parents[1]
TOML = PROTOCOLS / "tablet_blend.toml"
CSV = PROTOCOLS / "tablet_blend_runs.csv"


@pytest.fixture(scope="module")
def from_frame():
    return guardband.plan(TOML, pd.read_csv(CSV), seed=7, pool=300)


def test_a_plan_from_a_dataframe_matches_the_plan_from_the_file(from_frame):
    protocol = load_protocol(TOML)
    direct = plan_step(protocol, read_runs_file(CSV, protocol), seed=7, pool_size=300)
    assert isinstance(from_frame.proposals, pd.DataFrame) and isinstance(from_frame.exclusions, pd.DataFrame)
    assert len(from_frame.proposals) == len(direct.proposals) > 0
    X = from_frame.proposals[list(protocol.factor_names)].to_numpy()
    np.testing.assert_allclose(X, np.array([p.x for p in direct.proposals]), rtol=0, atol=1e-12)
    assert len(from_frame.exclusions) == direct.pool.shape[0]
    assert from_frame.counts == direct.counts()
    assert set(from_frame.models["response"]) == set(protocol.response_names)
    assert from_frame.log is None and "not logged" in repr(from_frame)


def test_reprs_are_short_and_carry_the_cautions(from_frame):
    text = repr(from_frame)
    assert len(text) < 2000 and "CAUTION" in text and "qualified person" in text
    assert len(repr(from_frame.result)) < 2000
    html = from_frame._repr_html_()
    assert "<table" in html and "Cautions" in html


def test_runs_as_csv_text_and_as_a_path_read_alike():
    protocol = load_protocol(TOML)
    a = guardband.read_runs(CSV.read_text(encoding="utf-8"), protocol)
    b = guardband.read_runs(CSV, protocol)
    c = guardband.read_runs(pd.read_csv(CSV), protocol)
    for other in (b, c):
        assert a.run_ids == other.run_ids
        np.testing.assert_array_equal(a.X, other.X)


def test_a_bad_dataframe_is_refused_naming_its_column():
    frame = pd.read_csv(CSV).drop(columns=["force"])
    with pytest.raises(RunsDataError, match="force"):
        guardband.plan(TOML, frame, seed=1, pool=200)
    with pytest.raises(RunsDataError, match="DataFrame"):
        guardband.read_runs(pd.read_csv(CSV).assign(force="strong"), TOML)


def test_with_out_the_step_is_logged_as_the_command_logs_it(tmp_path):
    logged = guardband.plan(TOML, pd.read_csv(CSV), seed=7, pool=300, out=tmp_path / "c", by="N. Book")
    assert logged.log["record"] == 0
    log = tmp_path / "c" / "decisions.jsonl"
    ledger.verify_or_raise(log)
    body = ledger.read_records(log)[0]["body"]
    assert body["operator"]["name"] == "N. Book"
    assert len(body["proposals"]) == len(logged.proposals)
    assert "logged as record 0" in repr(logged)


def test_the_readme_python_example_runs(tmp_path, monkeypatch):
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text[text.index("## From Python"):]
    code = re.search(r"```python\n(.*?)```", section, re.S).group(1)
    shutil.copytree(ROOT / "protocols", tmp_path / "protocols")
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("GUARDBAND_OPERATOR", "readme test")
    scope: dict = {}
    exec(compile(code, "README.md", "exec"), scope)  # noqa: S102 - the README's own example
    assert isinstance(scope["step"], guardband.Plan)
    assert (tmp_path / "notebook_campaign" / "decisions.jsonl").is_file()


def test_the_repr_says_what_the_runs_reader_flagged_and_keeps_the_cautions():
    """A value kept outside its bounds is said in the notebook as on the command line's stderr.

    Many such values are summed up in one line, so the cautions are never cut off the repr.
    """
    runs = pd.read_csv(CSV)
    runs.loc[0, "force"] = 25.0  # the protocol's bounds are [6, 20] kN
    text = repr(guardband.plan(TOML, runs, seed=7, pool=300))
    assert "warning: row 2 (run R01), column force: 25 is outside the bounds [6, 20] (kept)" in text
    assert "CAUTION" in text and text.rstrip().endswith("they are not guarantees.")
    runs.loc[:, "force"] = 25.0
    many = guardband.plan(TOML, runs, seed=7, pool=300)
    text = repr(many)
    assert len(many.result.flags) == len(runs) > 5
    assert text.count("warning: row") == 5
    assert f"and {len(runs) - 5} more warning(s) in .result.flags" in text
    assert len(text) < 2000 and text.rstrip().endswith("they are not guarantees.")
    assert "25 is outside the bounds" in many._repr_html_()


def test_a_logged_plan_of_another_study_says_so_in_its_repr(tmp_path):
    """As `plan --out` warns on stderr: the notebook's logged step says it in its repr."""
    camp = tmp_path / "camp"
    first = guardband.plan(TOML, CSV, seed=7, pool=300, out=camp, by="A. Chemist")
    assert "another study" not in repr(first)
    dose = guardband.plan(PROTOCOLS / "dose_combination.toml", PROTOCOLS / "dose_combination_runs.csv",
                          out=camp, by="A. Chemist")
    text = repr(dose)
    assert "warning: the campaign folder's last plan (record 0, protocol file tablet_blend.toml) is of another" in text
    assert text.rstrip().endswith(dose.cautions[-1]) and len(text) < 2000
