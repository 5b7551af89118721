"""Text from inputs: safe on the terminal, one spelling per name, and messages that say what to do.

Control sequences in a title or a run id must never reach the terminal raw;
names and run ids are compared in Unicode NFC and refused when they hide
characters or collide once case is ignored; a design space that is one
point, a model that cannot be fitted, near misses and the report's words
about each limit say what the user needs. Invented protocols and runs.
"""

from __future__ import annotations

import json
import types
import unicodedata
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from guardband.planner.app.review import _near_miss_text
from guardband.planner.app.textable import render_table
from guardband.planner.cli import app
from guardband.planner.errors import ModelError, RunsDataError
from guardband.planner.inputs.names import hidden_characters, name_key, shown
from guardband.planner.inputs.protocol import load_protocol, parse_protocol
from guardband.planner.inputs.runs import parse_runs_text
from guardband.planner.models.kernel import not_pd_advice
from guardband.planner.report.tables import band_label, judged_sentence
from guardband.planner.step import fitting

HERE = Path(__file__).resolve().parent / "bad_inputs"
PROTOCOLS = HERE.parents[1] / "protocols"
GOOD_TOML = (HERE / "good_blend.toml").read_text(encoding="utf-8")
GOOD_RUNS = (HERE / "good_blend_runs.csv").read_text(encoding="utf-8")
RAW = ("\x1b", "\r", "\u202e", "\x9b", "\u200f")  # ESC, CR, RIGHT-TO-LEFT OVERRIDE, CSI (C1), RLM


def _cli(argv):
    # color=True: click would otherwise strip ANSI sequences itself and hide the defect
    res = CliRunner().invoke(app, [str(a) for a in argv], color=True)
    assert res.exception is None or isinstance(res.exception, SystemExit), repr(res.exception)
    return res.exit_code, res.stdout, res.stderr


def _no_raw(text: str) -> None:
    for ch in RAW:
        assert ch not in text, f"{ch!r} reached the terminal"


def _write(tmp_path: Path, text: str, name: str = "p.toml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


# ------------------------------------------------ 8. the terminal
def test_shown_escapes_controls_and_direction_marks_and_keeps_layout():
    assert shown("a\x1b[2Jb") == "a\\u001b[2Jb"
    assert shown("x\ry\u202ez\u200d") == "x\\u000dy\\u202ez\\u200d"
    assert shown("line\n\tnext") == "line\n\tnext"
    assert shown("café µg 5 %") == "café µg 5 %"  # ordinary text passes untouched
    assert shown("a\nb", keep="") == "a\\u000ab"


def test_shown_keeps_json_valid_and_equal():
    obj = {"title": "t\x85\x7f\u202e\x1b", "id": "R\u2028"}
    text = shown(json.dumps(obj, ensure_ascii=False))
    _no_raw(text)
    assert json.loads(text) == obj


def test_tables_show_input_text_escaped():
    table = render_table(["run_id", "x"], [["R1\x1b[1A\r", 1.5]])
    _no_raw(table)
    assert "R1\\u001b[1A\\u000d" in table


TITLE = 'title = "Blend \\u001b[2J\\u001b[1A\\r\\u202Eevil \\u009b31m"'


@pytest.mark.parametrize("fmt", ["table", "csv", "json"])
def test_control_sequences_in_a_title_never_reach_the_terminal(tmp_path, fmt):
    path = _write(tmp_path, GOOD_TOML.replace('title = "Corpus blend (invented)"', TITLE))
    code, stdout, stderr = _cli(["check", path, "--format", fmt])
    assert code == 0, stderr
    _no_raw(stdout + stderr)
    if fmt == "json":
        assert json.loads(stdout)["protocol"]["title"].startswith("Blend \x1b[2J")  # the data itself is unchanged
    else:
        assert "\\u001b[2J" in stdout or fmt == "csv"


def test_control_sequences_in_a_title_are_escaped_in_the_plan_output(tmp_path):
    path = _write(tmp_path, GOOD_TOML.replace('title = "Corpus blend (invented)"', TITLE))
    code, stdout, stderr = _cli(["plan", path, HERE / "good_blend_runs.csv", "--out", tmp_path / "c", "--count", "1"])
    assert code in (0, 6), stderr
    _no_raw(stdout + stderr)
    assert "Blend \\u001b[2J" in stdout


@pytest.mark.parametrize("rid, shown_as", [
    ("C02\x1b[2K", "C02\\u001b[2K"),
    ("\u202eC02", "\\u202eC02"),
    ("C0\u200d2", "C0\\u200d2"),
    ("C02\u200f", "C02\\u200f"),
])
def test_a_run_id_with_hidden_characters_is_refused_and_shown_escaped(tmp_path, rid, shown_as):
    runs = _write(tmp_path, GOOD_RUNS.replace("C02,", rid + ",", 1), "runs.csv")
    out = tmp_path / "campaign"
    code, stdout, stderr = _cli(["plan", HERE / "good_blend.toml", runs, "--out", out])
    assert code == 4, stderr
    assert "row 3, column run_id" in stderr and shown_as in stderr
    assert "do not print or that change the text direction" in stderr
    _no_raw(stdout + stderr)
    assert not out.exists()


@pytest.mark.parametrize("name, char", [
    ("for\u200dce", "U+200D ZERO WIDTH JOINER"),
    ("force\u200e", "U+200E LEFT-TO-RIGHT MARK"),
    ("\u202bforce", "U+202B RIGHT-TO-LEFT EMBEDDING"),
    ("for\x1bce", "U+001B"),
])
def test_a_factor_name_with_hidden_characters_is_refused(tmp_path, name, char):
    toml_name = name.encode("unicode_escape").decode("ascii").replace("\\x1b", "\\u001b")
    path = _write(tmp_path, GOOD_TOML.replace('name = "force"', f'name = "{toml_name}"'))
    code, stdout, stderr = _cli(["check", path])
    assert code == 3
    assert "factors[3]" in stderr and char in stderr
    _no_raw(stdout + stderr)


# ------------------------------------------------ 9. names that print alike
@pytest.mark.parametrize("second", ["Filler", "FILLER", "\ufb01ller"])  # the last: U+FB01 LATIN SMALL LIGATURE FI
def test_factor_names_that_differ_only_in_case_or_form_collide(tmp_path, second):
    path = _write(tmp_path, GOOD_TOML.replace('name = "force"', f'name = "{second}"'))
    code, _, stderr = _cli(["check", path])
    assert code == 3
    assert "is used twice" in stderr


def test_composed_and_decomposed_names_are_one_name(tmp_path):
    composed, decomposed = "forc\u00e9", "force\u0301"
    assert composed != decomposed and name_key(composed) == name_key(decomposed)
    # two factors spelled the two ways: one name used twice
    text = GOOD_TOML.replace('name = "force"', f'name = "{composed}"').replace(
        'name = "api_mass"', f'name = "{decomposed}"')
    code, _, stderr = _cli(["check", _write(tmp_path, text)])
    assert code == 3 and "is used twice" in stderr
    # a runs header in the other form finds the protocol's factor
    protocol = load_protocol(_write(tmp_path, GOOD_TOML.replace('name = "force"', f'name = "{decomposed}"'), "q.toml"))
    assert protocol.factor_names[3] == composed  # stored in NFC
    runs = parse_runs_text(GOOD_RUNS.replace("force", decomposed, 1), protocol)
    plain = parse_runs_text(GOOD_RUNS, load_protocol(HERE / "good_blend.toml"))
    np.testing.assert_array_equal(runs.X, plain.X)


@pytest.mark.parametrize("first, second, extra", [
    ("C01", "c01", "differ only in case"),
    ("R\u00e9", "Re\u0301", ""),
    ("Ｃ01", "C01", "compatibility forms"),
])
def test_run_ids_that_collide_after_normalising_are_refused(first, second, extra):
    text = GOOD_RUNS.replace("C01,", first + ",", 1).replace("C02,", second + ",", 1)
    with pytest.raises(RunsDataError) as err:
        parse_runs_text(text, load_protocol(HERE / "good_blend.toml"))
    assert "row 3 (run" in str(err.value) and "is also used in row 2" in str(err.value)
    assert extra in str(err.value)


def test_hidden_characters_are_named():
    assert hidden_characters("a\u200db\u200f") == ["U+200D ZERO WIDTH JOINER", "U+200F RIGHT-TO-LEFT MARK"]
    assert hidden_characters("café µg") == []


# ------------------------------------------------ 9. messages
def test_a_single_point_design_space_is_refused_by_check_and_plan(tmp_path):
    text = (GOOD_TOML.replace("lower = 0.3\nupper = 0.9", "lower = 0.8\nupper = 0.8")
            .replace("lower = 0.05\nupper = 0.3", "lower = 0.1\nupper = 0.1")
            .replace("lower = 0.02\nupper = 0.2", "lower = 0.1\nupper = 0.1")
            .replace("lower = 5\nupper = 20", "lower = 10\nupper = 10")
            .replace("lower = 50\nupper = 150", "lower = 100\nupper = 100"))
    path = _write(tmp_path, text)
    code, stdout, stderr = _cli(["check", path])
    assert code == 3 and "ok" not in stdout + stderr.replace("Error", "")
    assert "the design space is a single point (filler = 0.8, binder = 0.1" in stderr
    assert "Widen a factor's bounds or relax a constraint" in stderr
    out = tmp_path / "campaign"
    code, _, stderr = _cli(["plan", path, HERE / "good_blend_runs.csv", "--out", out])
    assert code == 3 and "single point" in stderr and "no factor columns" not in stderr
    assert not out.exists()


def test_a_design_space_fixed_in_some_factors_only_is_still_planned(tmp_path):
    path = _write(tmp_path, GOOD_TOML.replace("lower = 5\nupper = 20", "lower = 10\nupper = 10"))
    code, _, stderr = _cli(["check", path])
    assert code == 0 and "1 fixed" in stderr


def test_an_unfittable_model_names_the_real_setting_and_the_repeated_runs(monkeypatch):
    advice = not_pd_advice(12)
    assert "noise_floor" not in advice and "`measurement_sd`" in advice

    def singular(*args, **kwargs):
        raise ModelError(not_pd_advice(4))

    monkeypatch.setattr(fitting, "fit_gp", singular)
    U = np.array([[0.1, 0.2], [0.5, 0.5], [0.1, 0.2], [0.9, 0.1]])
    job = dict(response="y", role="objective", U=U, y=np.array([1.0, 2.0, 3.0, 4.0]), ids=["A1", "B2", "C3", "D4"],
               prior_mean=None, restarts=1, warm=None, seed=0, length_scale_max=None,
               ml_runs_per_hyperparameter=12.0, widen=False, short=None, noise_sd=0.0, local=None)
    model, summary = fitting._fit_job(job)
    assert model is None
    assert "measurement_sd" in summary.message and "A1 and C3" in summary.message
    assert "B2" not in summary.message.split("same factor settings")[1]


def test_near_miss_text_shows_every_limits_probability():
    text = _near_miss_text({"candidate": 7, "reason": "limit-probability", "detail": "degradant_b 0.948 < 0.95",
                            "joint": 0.33, "p": {"degradant_b": 0.948, "friability": 0.38}})
    assert "joint 0.33" in text and "degradant_b 0.948" in text and "friability 0.38" in text


def _result_with_judging(kinds: list[str]):
    data = load_protocol(PROTOCOLS / "tablet_blend.toml").model_dump(mode="json")
    for lim, kind in zip(data["limits"], kinds):
        lim["judged_on"] = kind
    return types.SimpleNamespace(protocol=parse_protocol(data))


def test_report_wording_follows_each_limits_judged_on():
    measured = judged_sentence(_result_with_judging(["measurement", "measurement"]))
    assert measured == "Each limit's figure is the probability that a new measurement meets it."
    true = judged_sentence(_result_with_judging(["true-value", "true-value"]))
    assert "true value" in true and "new measurement" not in true
    mixed = judged_sentence(_result_with_judging(["measurement", "true-value"]))
    assert "a new measurement meets it (degradant_b)" in mixed and "true value" in mixed and "(friability)" in mixed
    assert "new measurement" not in band_label(_result_with_judging(["true-value", "true-value"]))
    assert "each is judged" in band_label(_result_with_judging(["measurement", "true-value"]))
