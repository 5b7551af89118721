"""`guardband judge`: the chemist's own recipes, judged as the plan judges its candidates."""

import csv
import io
import json

import numpy as np
import pytest
from typer.testing import CliRunner

from guardband.planner.cli import app
from guardband.planner.errors import EXIT_RUNS
from guardband.safety import ledger

from conftest import PROTOCOLS

runner = CliRunner()
TABLET = (PROTOCOLS / "tablet_blend.toml", PROTOCOLS / "tablet_blend_runs.csv")


def run(*args):
    return runner.invoke(app, [str(a) for a in args], catch_exceptions=False)


def _recipes_csv(path, factor_names, rows):
    with open(path, "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(["run_id", *factor_names])
        for name, x in rows:
            w.writerow([name, *[repr(float(v)) for v in x]])


@pytest.fixture(scope="module")
def fed_back(tmp_path_factory):
    """A plan, then its proposals (and one recipe of our own) judged in the same folder."""
    tmp = tmp_path_factory.mktemp("judge")
    camp = tmp / "camp"
    res = run("plan", *TABLET, "--out", camp, "--seed", 11, "--count", 2, "--pool", 300, "--format", "json")
    assert res.exit_code == 0, res.output
    plan = json.loads(res.stdout)
    names = list(plan["proposals"][0]["x"])
    rows = [(f"P{p['rank']}", list(p["x"].values())) for p in plan["proposals"]]
    rows.append(("far", [0.1, 0.40, 0.40, 0.04, 0.04, 0.02, 12.0]))
    _recipes_csv(tmp / "recipes.csv", names, rows)
    res = run("judge", *TABLET, tmp / "recipes.csv", "--out", camp, "--seed", 11, "--format", "json")
    assert res.exit_code == 0, res.output
    return plan, json.loads(res.stdout), camp


def test_a_proposal_fed_back_gets_the_plans_own_figures(fed_back):
    plan, judged, _ = fed_back
    assert plan["proposals"]
    for prop in plan["proposals"]:
        v = next(v for v in judged["verdicts"] if v["recipe"] == f"P{prop['rank']}")
        assert v["passes"] and v["reason"] == "passes" and v["inside_design_space"]
        for key in ("mean", "sd", "lo95", "hi95"):
            assert v["objective"][key] == pytest.approx(prop["objective"][key], rel=0, abs=1e-12)
        for name, p in prop["p"].items():
            assert v["p"][name] == pytest.approx(p, rel=0, abs=1e-12)
        assert v["joint"] == pytest.approx(prop["joint"], rel=0, abs=1e-12)
        for rule, value in prop["values"].items():
            assert v["values"][rule] == pytest.approx(value, rel=1e-12, abs=0), rule


def test_the_judgement_is_its_own_record_and_the_folder_verifies(fed_back):
    _, judged, camp = fed_back
    records = ledger.read_records(camp / "decisions.jsonl")
    assert [r["kind"] for r in records] == ["plan", "judge"]
    assert records[1]["body"]["verdicts"] == judged["verdicts"]
    res = run("verify", camp / "decisions.jsonl")
    assert res.exit_code == 0, res.output
    # plan, exclusions, judge table, the notes file of each, three input copies
    assert "9 named files" in res.output


def test_a_recipe_that_fails_gets_the_screens_reason(fed_back):
    _, judged, _ = fed_back
    far = next(v for v in judged["verdicts"] if v["recipe"] == "far")
    assert not far["passes"]
    # the reasons of safety/screen.py, in their order
    from guardband.safety.screen import REASONS

    assert far["reason"] in REASONS and far["detail"]


def test_a_recipe_outside_the_bounds_says_why(tmp_path):
    names = ["active", "mcc", "lactose", "croscarmellose", "povidone", "mg_stearate", "force"]
    # force 40 kN lies beyond the protocol's bound
    _recipes_csv(tmp_path / "r.csv", names, [("hot", [0.1, 0.48875, 0.38875, 0.01, 0.01, 0.0025, 40.0])])
    res = run("judge", *TABLET, tmp_path / "r.csv", "--out", tmp_path / "c", "--seed", 1, "--format", "json")
    assert res.exit_code == 0, res.output
    v = json.loads(res.stdout)["verdicts"][0]
    assert not v["inside_design_space"] and v["reason"] == "outside-design-space"
    assert "force" in v["detail"]


def test_a_bad_recipes_table_is_refused_naming_file_row_column_and_nothing_is_written(tmp_path):
    (tmp_path / "r.csv").write_text("run_id,active,mcc,lactose,croscarmellose,povidone,mg_stearate,force\n"
                                    "A,0.1,0.48875,0.38875,0.01,0.01,0.0025,thirteen\n")
    res = runner.invoke(app, ["judge", *map(str, TABLET), str(tmp_path / "r.csv"), "--out", str(tmp_path / "c")])
    assert res.exit_code == EXIT_RUNS
    assert "r.csv" in res.stderr and "row 2" in res.stderr and "force" in res.stderr
    assert not (tmp_path / "c").exists()


def test_the_csv_output_carries_the_cautions(tmp_path):
    names = ["active", "mcc", "lactose", "croscarmellose", "povidone", "mg_stearate", "force"]
    _recipes_csv(tmp_path / "r.csv", names, [("A", [0.1, 0.48875, 0.38875, 0.01, 0.01, 0.0025, 13.0])])
    res = run("judge", *TABLET, tmp_path / "r.csv", "--out", tmp_path / "c", "--seed", 1, "--format", "csv")
    assert res.exit_code == 0
    assert "CAUTIONS" in res.stderr and "qualified person" in res.stderr
    rows = list(csv.reader(io.StringIO(res.stdout)))
    assert rows[0][0] == "recipe" and rows[1][0] == "A" and len(rows) == 2
    assert rows[0][-1] == "cautions" and "qualified person" in rows[1][-1]


def test_a_recipe_that_repeats_a_run_in_progress_is_named(tmp_path):
    names = ["active", "mcc", "lactose", "croscarmellose", "povidone", "mg_stearate", "force"]
    x = [0.1, 0.45, 0.40, 0.03, 0.01, 0.01, 12.0]
    lines = TABLET[1].read_text().splitlines()
    lines.append("R99," + ",".join(map(str, x)) + ",,,,in the lab")
    (tmp_path / "runs.csv").write_text("\n".join(lines) + "\n")
    _recipes_csv(tmp_path / "r.csv", names, [("again", x)])
    res = run("judge", TABLET[0], tmp_path / "runs.csv", tmp_path / "r.csv", "--out", tmp_path / "c",
              "--seed", 1, "--format", "json")
    assert res.exit_code == 0, res.output
    notes = json.loads(res.stdout)["messages"]
    assert any("recipe again" in m and "R99" in m for m in notes), notes


def _gridded_protocol(path):
    """The tablet protocol with resolutions: 0.001 of a fraction for each varying component, 0.5 kN of force."""
    text = TABLET[0].read_text(encoding="utf-8")
    for name in ("mcc", "lactose", "croscarmellose", "povidone", "mg_stearate"):
        head = f'name = "{name}"'
        at = text.index(head)
        end = text.index('unit = "fraction"', at) + len('unit = "fraction"')
        text = text[:end] + "\nresolution = 0.001" + text[end:]
    at = text.index('name = "force"')
    end = text.index("\n", text.index("unit =", at))
    text = text[:end] + "\nresolution = 0.5" + text[end:]
    path.write_text(text, encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def gridded(tmp_path_factory):
    """A plan on a protocol with resolutions; its first proposal judged as given and nudged off the grid."""
    tmp = tmp_path_factory.mktemp("grid")
    protocol = _gridded_protocol(tmp / "gridded.toml")
    camp = tmp / "camp"
    res = run("plan", protocol, TABLET[1], "--out", camp, "--seed", 11, "--count", 1, "--pool", 300,
              "--format", "json")
    assert res.exit_code == 0, res.output
    plan = json.loads(res.stdout)
    prop = plan["proposals"][0]
    names = list(prop["x"])
    x = list(prop["x"].values())
    nudged = list(x)
    nudged[names.index("mcc")] += 0.0004  # 0.4 of a unit up
    nudged[names.index("lactose")] -= 0.0004  # 0.4 of a unit down: the total holds
    _recipes_csv(tmp / "recipes.csv", names, [("P1", x), ("nudged", nudged)])
    res = run("judge", protocol, TABLET[1], tmp / "recipes.csv", "--out", camp, "--seed", 11, "--format", "json")
    assert res.exit_code == 0, res.output
    csv_res = run("judge", protocol, TABLET[1], tmp / "recipes.csv", "--out", tmp / "camp2", "--seed", 11,
                  "--format", "csv")
    assert csv_res.exit_code == 0, csv_res.output
    return prop, json.loads(res.stdout), list(csv.DictReader(io.StringIO(csv_res.stdout))), protocol


def _same_figures(v, prop):
    for key in ("mean", "sd", "lo95", "hi95"):
        assert v["objective"][key] == pytest.approx(prop["objective"][key], rel=0, abs=1e-12)
    for name, p in prop["p"].items():
        assert v["p"][name] == pytest.approx(p, rel=0, abs=1e-12)
    assert v["joint"] == pytest.approx(prop["joint"], rel=0, abs=1e-12)


def test_a_proposal_on_the_grid_is_judged_as_the_plan_judged_it(gridded):
    prop, judged, rows, _ = gridded
    v = judged["verdicts"][0]
    assert "off_grid" not in v and v["passes"]
    _same_figures(v, prop)
    assert rows[0]["recipe"] == "P1" and rows[0]["grid"] == "on"


def test_a_recipe_off_the_grid_is_judged_as_given_flagged_and_its_rounding_judged_too(gridded):
    prop, judged, rows, protocol = gridded
    v = judged["verdicts"][1]
    assert v["off_grid"] == ["mcc", "lactose"]
    # judged as given: the amounts are the recipe's own
    assert v["x"]["mcc"] == pytest.approx(prop["x"]["mcc"] + 0.0004, abs=1e-15)
    # rounded as proposals are (largest remainder: lactose's 0.6 of a unit beats mcc's 0.4), which
    # brings back the plan's own proposal and so its own figures
    from guardband.planner.inputs.protocol import load_protocol
    from guardband.planner.space.rounding import rounding_of

    expected = rounding_of(load_protocol(protocol)).round([list(v["x"].values())])[0]
    assert list(v["rounded"]["x"].values()) == pytest.approx(list(prop["x"].values()), abs=1e-15)
    assert list(v["rounded"]["x"].values()) == list(expected)
    assert v["rounded"]["recipe"] == "nudged (rounded)"
    _same_figures(v["rounded"], prop)
    assert v["joint"] != v["rounded"]["joint"]  # the given amounts were judged, not the rounded ones
    assert [(r["recipe"], r["grid"]) for r in rows] == [
        ("P1", "on"), ("nudged", "off: mcc, lactose"), ("nudged (rounded)", "rounded")]
    notes = judged["messages"]
    assert any("recipe nudged is off the resolution grid" in m and "mcc" in m and "judged as given" in m
               for m in notes), notes


def test_a_protocol_without_resolutions_keeps_its_judge_table(tmp_path):
    names = ["active", "mcc", "lactose", "croscarmellose", "povidone", "mg_stearate", "force"]
    _recipes_csv(tmp_path / "r.csv", names, [("A", [0.1, 0.4887512345, 0.3887487655, 0.01, 0.01, 0.0025, 13.0])])
    res = run("judge", *TABLET, tmp_path / "r.csv", "--out", tmp_path / "c", "--seed", 1, "--format", "csv")
    assert res.exit_code == 0, res.output
    rows = list(csv.reader(io.StringIO(res.stdout)))
    assert "grid" not in rows[0] and len(rows) == 2
    assert "off_grid" not in json.loads(run("judge", *TABLET, tmp_path / "r.csv", "--out", tmp_path / "d",
                                            "--seed", 1, "--format", "json").stdout)["verdicts"][0]


def test_what_the_runs_and_recipes_readers_flag_reaches_the_notes_the_record_and_stderr(tmp_path):
    """A unit converted or a value outside its bounds in either input is said, naming the file.

    `plan` prints the runs file's flags and keeps them in its record; `judge`
    used to keep only the recipes file's, in its notes, and to print neither.
    """
    lines = TABLET[1].read_text().splitlines()
    header = lines[0].split(",")
    k = header.index("force")
    header[k] = "force [N]"  # the runs in newtons: converted to the protocol's kN, and said so
    rows = [line.split(",") for line in lines[1:]]
    for r in rows:
        r[k] = repr(float(r[k]) * 1000)
    (tmp_path / "runs.csv").write_text("\n".join(",".join(r) for r in [header, *rows]) + "\n")
    names = ["active", "mcc", "lactose", "croscarmellose", "povidone", "mg_stearate", "force"]
    _recipes_csv(tmp_path / "r.csv", names, [("hot", [0.1, 0.48875, 0.38875, 0.01, 0.01, 0.0025, 40.0])])
    res = runner.invoke(app, ["judge", str(TABLET[0]), str(tmp_path / "runs.csv"), str(tmp_path / "r.csv"),
                              "--out", str(tmp_path / "c"), "--seed", "1"], catch_exceptions=False)
    assert res.exit_code == 0, res.output
    converted = "runs file runs.csv: column H (force): values converted [N] -> [kN]"
    outside = "recipes file r.csv: row 2 (run hot), column force: 40 is outside the bounds [6, 20] (kept)"
    for said in (converted, outside):
        assert f"warning: {said}" in res.stderr
    notes = next((tmp_path / "c").glob("judge-*.notes.txt")).read_text()
    assert f"warning: {converted}" in notes and f"warning: {outside}" in notes
    body = ledger.read_records(tmp_path / "c" / "decisions.jsonl")[-1]["body"]
    assert any(f.startswith("column H (force): values converted [N] -> [kN]") for f in body["runs_flags"])
    assert body["flags"] == ["row 2 (run hot), column force: 40 is outside the bounds [6, 20] (kept)"]


def test_the_terminal_table_gives_each_factor_its_unit(tmp_path):
    """A recipe given in newtons is shown converted to the protocol's kN: the header must say so
    (it said 'force', so 13 read as what the chemist typed)."""
    names = ["active", "mcc", "lactose", "croscarmellose", "povidone", "mg_stearate", "force [N]"]
    _recipes_csv(tmp_path / "r.csv", names, [("A", [0.1, 0.48875, 0.38875, 0.01, 0.01, 0.0025, 13000.0])])
    res = run("judge", *TABLET, tmp_path / "r.csv", "--out", tmp_path / "c", "--seed", 1)
    assert res.exit_code == 0, res.output
    lines = res.stdout.splitlines()
    header = " ".join(ln for ln in lines if ln.startswith("recipe "))  # blocks that fit the width
    assert "force [kN]" in header and "mcc [fraction]" in header
    values = " ".join(ln for ln in lines if ln.startswith("A "))
    assert " 13 " in values and "13000" not in values
    # the CSV table keeps plain column names, as every table a program reads
    res = run("judge", *TABLET, tmp_path / "r.csv", "--out", tmp_path / "c", "--seed", 1, "--format", "csv")
    assert next(csv.reader(io.StringIO(res.stdout)))[7] == "force"
