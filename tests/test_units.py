"""Units: conversions where they are safe, refusals where a planner would have to guess."""

from __future__ import annotations

import re

import numpy as np
import pytest

from guardband.planner.errors import RunsDataError
from guardband.planner.inputs.protocol import parse_protocol
from guardband.planner.inputs.runs import parse_runs_text
from guardband.planner.step import safe_runs_mask
from guardband.planner.inputs.units import UnitError, conversion, read_unit

pytest.importorskip("pint")


# ------------------------------------------------------------------ reading
@pytest.mark.parametrize("text", ["% released", "fraction", "score", "fraction of cohort", "% of label",
                                  "% weight loss", "% w/w", "% v/v", "w/w"])
def test_unknown_or_cancelling_texts_are_labels(text):
    assert read_unit(text).kind == "label"


@pytest.mark.parametrize("text, reading", [("%", "percent"), ("percent", "percent"), ("kN", "kilonewton"),
                                           ("mg/kg", "milligram / kilogram"), ("°C", "degree_Celsius"),
                                           ("mg·kg⁻¹", "milligram / kilogram"), ("mg per kg", "milligram / kilogram")])
def test_known_units_are_read(text, reading):
    r = read_unit(text)
    assert r.kind == "unit" and r.reading == reading


def test_empty_text_is_no_unit():
    assert read_unit("  ").kind == "none"


@pytest.mark.parametrize("text", ["m^(9^9^9)", "m^999", "kg" * 40, "mg; drop table"])
def test_hostile_or_odd_text_is_not_handed_to_the_parser(text):
    assert read_unit(text).kind == "label"


# ------------------------------------------------------------------ conversions
# Reference values are definitions: SI prefixes, the international avoirdupois
# pound and standard gravity (NIST SP 811, 2008, appendix B; from memory:
# 1 lbf = 4.4482216152605 N exactly), the Celsius and Fahrenheit scales
# (water freezes at 32 degF = 0 degC, 100 degC = 212 degF; trade practice).
@pytest.mark.parametrize(
    "source, target, value, expected",
    [
        ("mg", "g", 250.0, 0.25),
        ("g", "mg", 0.25, 250.0),
        ("N", "kN", 13000.0, 13.0),
        ("lbf", "N", 1.0, 4.4482216152605),
        ("degF", "degC", 212.0, 100.0),
        ("degF", "degC", 32.0, 0.0),
        ("K", "degC", 273.15, 0.0),
        ("ppm", "%", 5000.0, 0.5),
        ("percent", "%", 12.5, 12.5),
        ("mg/kg", "ug/g", 3.0, 3.0),
        ("ug/kg", "mg/kg", 2500.0, 2.5),
        ("mPa*s", "cP", 4.0, 4.0),
        ("mL", "L", 1500.0, 1.5),
        ("min", "h", 90.0, 1.5),
    ],
)
def test_conversions_match_the_definitions(source, target, value, expected):
    conv = conversion(source, target)
    assert not conv.identity
    np.testing.assert_allclose(conv.apply([value]), [expected], rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize(
    "source, target, why",
    [
        ("mg", "mL", "different kinds of quantity"),       # mass where a volume is expected
        ("mg", "mg/kg", "different kinds of quantity"),    # a dose, not a dose per body weight
        ("mg/kg", "mg", "different kinds of quantity"),
        ("mg/kg", "ppm", "measure different things"),      # both plain numbers to the library
        ("ppm", "mg/kg", "measure different things"),
        ("mg/kg", "%", "measure different things"),
        ("mL/L", "%", "measure different things"),
        ("mL/L", "mg/kg", "measure different things"),
        ("count", "%", "measure different things"),
        ("degree", "%", "measure different things"),
        ("mg/kg/day", "1/day", "measure different things"),
        ("kn", "kN", "knot"),                              # case matters: a knot is a speed
        ("K", "C", "coulomb"),                             # "C" is the coulomb to the library
        ("%", "% released", "label the tool does not convert"),
        ("% w/w", "% v/v", "label the tool does not convert"),
        ("fraction", "%", "is not a unit the tool knows"),
        ("mg", "", "the protocol gives no unit"),
    ],
)
def test_unsafe_conversions_are_refused(source, target, why):
    with pytest.raises(UnitError, match=re.escape(why)):
        conversion(source, target)


def test_identical_text_is_accepted_even_for_labels():
    for text in ("% released", "fraction of cohort", "kN", "  mg  /kg "):
        conv = conversion(text, " ".join(text.split()))
        assert conv.identity


def test_apply_does_not_change_the_callers_array_and_keeps_nan():
    values = np.array([250.0, np.nan, 1.0])
    keep = values.copy()
    out = conversion("mg", "g").apply(values)
    np.testing.assert_array_equal(values, keep)
    assert out[0] == 0.25 and np.isnan(out[1])  # rounded: no 0.25000000000000006


def test_unit_error_is_a_runs_data_error():
    assert issubclass(UnitError, RunsDataError)


# ------------------------------------------------------------------ in a runs file
PROTOCOL = parse_protocol({
    "study": {"title": "t", "version": "1", "author": "me"},
    "factors": [
        {"name": "force", "kind": "continuous", "lower": 5, "upper": 20, "unit": "kN"},
        {"name": "dose", "kind": "discrete", "levels": [0, 1, 2, 5], "unit": "mg/kg"},
        {"name": "temp", "kind": "continuous", "lower": 20, "upper": 40, "unit": "degC"},
    ],
    "objective": {"name": "y", "direction": "maximize", "unit": "% released"},
    "limits": [{"name": "imp", "upper": 0.5, "unit": "%", "probability": 0.9}],
    "screen": {"threshold": 0.9},
})

RUNS = """run_id,force,dose,temp,y,imp
R1,13,1,25,50,0.4
R2,6,2,30,55,0.6
R3,18,5,35,60,0.2
"""


def parse(text):
    return parse_runs_text(text, PROTOCOL, source="runs.csv")


def test_header_units_convert_values_to_protocol_units_before_any_check():
    text = ("run_id,force [N],dose [ug/kg],temp [degF],y,imp [ppm]\n"
            "R1,13000,1000,77,50,4000\nR2,6000,2000,86,55,6000\nR3,18000,5000,95,60,2000\n")
    converted, plain = parse(text), parse(RUNS)
    np.testing.assert_allclose(converted.X, plain.X, rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(converted.Y["imp"], plain.Y["imp"], rtol=1e-12)
    # converted values are inside the bounds and on the levels: no flag says otherwise
    assert not [f for f in converted.flags if "outside" in f or "levels" in f]
    assert sum("values converted" in f for f in converted.flags) == 4
    assert any("column B (force): values converted [N] -> [kN] (x 0.001)" in f for f in converted.flags)


def test_a_limit_reported_in_another_unit_is_judged_in_the_limits_unit():
    # 4000 ppm = 0.4 % meets "imp <= 0.5 %"; 6000 ppm = 0.6 % does not (ppm = 1e-4 %, definition)
    text = RUNS.replace("imp\n", "imp [ppm]\n").replace(",0.4\n", ",4000\n").replace(",0.6\n", ",6000\n").replace(",0.2\n", ",2000\n")
    np.testing.assert_array_equal(safe_runs_mask(PROTOCOL, parse(text)), [True, False, True])


def test_wrong_units_name_the_column_and_all_are_reported_together():
    text = RUNS.replace("force,dose,temp,y,imp", "force [mg],dose [mg],temp [s],y [%],imp [mg/kg]")
    with pytest.raises(RunsDataError) as info:
        parse(text)
    msg = str(info.value)
    assert msg.startswith("runs.csv: 5 problems found")
    for fragment in ("column B (force): the header states unit [mg] but the protocol's unit is [kN]",
                     "column C (dose): the header states unit [mg] but the protocol's unit is [mg/kg]",
                     "column D (temp)", "column E (y)", "column F (imp)"):
        assert fragment in msg


def test_a_dose_per_body_weight_is_never_read_as_a_plain_ratio():
    with pytest.raises(RunsDataError, match=re.escape("column C (dose): the header states unit [ppm]")):
        parse(RUNS.replace(",dose,", ",dose [ppm],"))
