"""The runs table: every problem named by row and column, reported together."""

import re

import numpy as np
import pytest

from guardband.planner.errors import RunsDataError
from guardband.planner.inputs.protocol import parse_protocol
from guardband.planner.inputs.runs import parse_runs_text

PROTOCOL = parse_protocol({
    "study": {"title": "t", "version": "1", "author": "me"},
    "mixture": {"total": 1.0, "tolerance": 0.002},
    "factors": [
        {"name": "a", "kind": "component", "lower": 0.1, "upper": 0.7},
        {"name": "b", "kind": "component", "lower": 0.3, "upper": 0.9},
        {"name": "t", "kind": "continuous", "lower": 10, "upper": 30, "unit": "C"},
    ],
    "objective": {"name": "y", "direction": "maximize"},
    "limits": [{"name": "imp", "upper": 0.15, "probability": 0.95}],
    "screen": {"threshold": 0.9},
})

GOOD = """run_id,a,b,t,y,imp,notes
R1,0.3,0.7,20,5.0,0.1,first
R2,0.5,0.5,25,6.0,,imp pending
R3,0.4,0.6,15,,,not measured yet
"""


def parse(text, **kw):
    return parse_runs_text(text, PROTOCOL, source="runs.csv", **kw)


def test_good_file():
    t = parse(GOOD)
    assert t.run_ids == ("R1", "R2", "R3")
    np.testing.assert_allclose(t.X[1], [0.5, 0.5, 25])
    assert np.isnan(t.Y["imp"][1])
    np.testing.assert_array_equal(t.pending, [False, False, True])
    assert t.notes[0] == "first"
    assert len(t.sha256) == 64


@pytest.mark.parametrize(
    "text, message",
    [
        (GOOD.replace("imp,notes", "impurity,notes"),
         "column F: unknown column 'impurity'"),
        (GOOD.replace(",imp,notes", ",notes").replace(",0.1,first", ",first").replace("6.0,,imp", "6.0,imp").replace(",,,not", ",,not"),
         "missing column 'imp'"),
        (GOOD.replace("R2,0.5", "R2,abc"), "row 3 (run R2), column a: 'abc' is not a number"),
        (GOOD.replace("R2,0.5,0.5", "R2,0.5,0.6"), "row 3 (run R2): the components add up to 1.1, not 1 (tolerance 0.002)"),
        (GOOD.replace("R3,", "R1,"), "row 4 (run R1), column run_id: run id 'R1' is also used in row 2"),
        (GOOD.replace("R3,", ","), "row 4, column run_id: the run id is empty"),
        (GOOD.replace("R1,0.3,0.7,20", "R1,0.3,0.7,"), "row 2 (run R1), column t: the factor value is empty"),
        (GOOD.replace("5.0,0.1", "5.0,nan"), "row 2 (run R1), column imp: 'nan' is not a finite number"),
        (GOOD.replace("6.0,,", "six,,"), "row 3 (run R2), column y: 'six' is not a number (leave it empty if not measured)"),
        (GOOD.replace("t,y", "t [K],y"), "column D (t): the header states unit [K] but the protocol's unit is [C]"),
        (GOOD.replace("run_id,a", "run_id,a,a"), "column C: header 'a' appears twice"),
        ("", "runs.csv: the file is empty; it needs a header row"),
    ],
    ids=["unknown-column", "missing-column", "not-a-number", "mixture-sum", "duplicate-id",
         "empty-id", "empty-factor", "nan-response", "text-response", "unit-mismatch",
         "duplicate-header", "empty-file"],
)
def test_problems_name_row_and_column(text, message):
    with pytest.raises(RunsDataError, match=re.escape(message)):
        parse(text)


def test_all_problems_reported_together():
    bad = GOOD.replace("R1,0.3", "R1,x").replace("R2,0.5,0.5,25,6.0", "R2,0.5,0.5,25,zz")
    with pytest.raises(RunsDataError) as info:
        parse(bad)
    text = str(info.value)
    assert text.startswith("runs.csv: 2 problems found")
    assert "row 2 (run R1), column a" in text and "row 3 (run R2), column y" in text


def test_out_of_bounds_is_kept_but_flagged():
    t = parse(GOOD.replace("R1,0.3,0.7,20", "R1,0.3,0.7,35"))
    assert t.X[0, 2] == 35
    assert any("row 2 (run R1), column t: 35 is outside the bounds [10, 30] (kept)" in f for f in t.flags)


def test_semicolon_and_decimal_comma_with_bom_and_blank_trailing_rows():
    text = "\ufeff" + GOOD.replace(",", ";").replace("0.", "0,").replace("5.0", "5,0").replace("6.0", "6,0") + ";;;;;;\n\n"
    t = parse(text)
    np.testing.assert_allclose(t.X[0], [0.3, 0.7, 20])
    assert t.Y["y"][0] == pytest.approx(5.0)


def test_a_stated_decimal_point_for_a_file_of_decimal_commas_is_reported_once_only_when_unambiguous():
    semicolons = GOOD.replace(",", ";").replace("0.", "0,").replace("5.0", "5,0").replace("6.0", "6,0")
    with pytest.raises(RunsDataError) as err:
        parse(semicolons, decimal=".")
    assert "runs.csv: 1 problem found" in str(err.value)
    assert ("the decimal mark is stated as '.' (--decimal .), but the file appears to use decimal commas "
            "(row 2, column a: '0,3'; no number has a decimal point)") in str(err.value)
    # '1,250' may be a thousands separator: each such cell is asked about, not the whole file
    grouped = "run_id;a;b;t;y;imp;notes\nR1;1;0;20;1,250;;first\nR2;1;0;25;2,500;;\n"
    with pytest.raises(RunsDataError) as err:
        parse(grouped, decimal=".")
    assert "appears to use decimal commas" not in str(err.value)
    assert "row 2 (run R1), column y: '1,250' has a comma: a decimal comma or a thousands separator?" in str(err.value)
    # in a comma-separated file a comma inside a number is always asked about cell by cell
    quoted = GOOD.replace("R1,0.3,0.7", 'R1,"0,3","0,7"')
    with pytest.raises(RunsDataError) as err:
        parse(quoted, decimal=".")
    assert "appears to use decimal commas" not in str(err.value)
    assert "row 2 (run R1), column a: '0,3' has a comma" in str(err.value)


def test_header_whitespace_and_matching_unit_are_accepted():
    t = parse(GOOD.replace("t,y", " t [C] , y "))
    np.testing.assert_allclose(t.X[:, 2], [20, 25, 15])


def test_leading_comment_lines_are_skipped_and_rows_still_count_them():
    # our own starting designs begin with "# ..." lines (fingerprint, cautions)
    text = "# Guardband starting design - a, b\n# CAUTIONS:\n" + GOOD
    t = parse(text)
    assert t.run_ids == ("R1", "R2", "R3")
    with pytest.raises(RunsDataError, match=re.escape("row 5 (run R2), column a: 'abc' is not a number")):
        parse(text.replace("R2,0.5", "R2,abc"))


def test_a_run_that_breaks_a_rule_of_the_protocol_is_kept_but_flagged():
    """A measured run outside the design space by a rule (not a bound) is said, as a bound is."""
    data = PROTOCOL.model_dump(mode="python")
    data["constraints"] = [{"name": "a to b", "rule": "a / b <= 0.7"}]
    protocol = parse_protocol(data)
    # R2 has a / b = 1; R1 (0.43) and R3 (0.67) keep the rule
    t = parse_runs_text(GOOD, protocol, source="runs.csv")
    assert t.X[1, 0] == 0.5
    broken = [f for f in t.flags if "rule" in f]
    assert len(broken) == 1
    assert broken[0].startswith("row 3 (run R2): breaks the rule constraint a to b: 'a / b <= 0.7'")
    assert broken[0].endswith("(kept)")
    # on the rule's edge, as a value typed to a few digits leaves it, is not flagged
    edge = GOOD.replace("R2,0.5,0.5", "R2,0.41176,0.58824")  # a / b = 0.69998
    assert not [f for f in parse_runs_text(edge, protocol, source="runs.csv").flags if "rule" in f]
    edge = GOOD.replace("R2,0.5,0.5", "R2,0.41177,0.58823")  # a / b = 0.70001: a typing rounding, not flagged
    assert not [f for f in parse_runs_text(edge, protocol, source="runs.csv").flags if "rule" in f]
