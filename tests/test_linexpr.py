"""The linear-rule parser: readable inequalities become rows a @ x <= b."""

import re

import numpy as np
import pytest

from guardband.planner.inputs.rules import RuleSyntaxError, parse_rule

NAMES = ("a", "b", "c", "my factor")


def rows(text):
    out = []
    for rule in parse_rule(text):
        out += rule.upper_rows(NAMES)
    return [(np.array(a), b) for a, b in out]


@pytest.mark.parametrize(
    "text, expected",
    [
        ("a <= 3", [([1, 0, 0, 0], 3)]),
        ("a >= 2 * b", [([-1, 2, 0, 0], 0)]),
        ("0.5*a + b - c <= 0.3", [([0.5, 1, -1, 0], 0.3)]),
        ("2 * (a + b) <= 1", [([2, 2, 0, 0], 1)]),
        ("a / b <= 3", [([1, -3, 0, 0], 0)]),  # ratio rewritten as a - 3 b <= 0
        ("3 >= a / b", [([1, -3, 0, 0], 0)]),
        ("(a + c) / b >= 0.5", [([-1, 0.5, -1, 0], 0)]),
        ("a / 4 + b / 2 <= 1", [([0.25, 0.5, 0, 0], 1)]),
        ("`my factor` - a >= 0", [([1, 0, 0, -1], 0)]),
        ("-a <= -1", [([-1, 0, 0, 0], -1)]),
        ("a + 1 <= b + 2", [([1, -1, 0, 0], 1)]),
        ("1e-2 <= a + b <= 4.5E1", [([-1, -1, 0, 0], -0.01), ([1, 1, 0, 0], 45)]),
        ("a + b == 1", [([1, 1, 0, 0], 1), ([-1, -1, 0, 0], -1)]),
        ("a < 3", [([1, 0, 0, 0], 3)]),  # strict read as non-strict
    ],
    ids=lambda v: v if isinstance(v, str) else "",
)
def test_rules_become_rows(text, expected):
    got = rows(text)
    assert len(got) == len(expected)
    for (a, b), (ea, eb) in zip(got, expected):
        np.testing.assert_allclose(a, ea, atol=1e-15)
        assert b == pytest.approx(eb, abs=1e-15)


def test_ratio_records_its_divisor():
    (rule,) = parse_rule("a / (b + c) <= 2")
    assert rule.divisors == (((("b", 1.0), ("c", 1.0)), 0.0),)


def test_describe_normalised_form():
    (rule,) = parse_rule("a >= 2 * b")
    assert rule.describe() == "a - 2*b >= 0"


@pytest.mark.parametrize(
    "text, message",
    [
        ("a * b <= 1", "the product of two factors is not linear at position 3"),
        ("a + b", "the rule has no comparison (use <=, >= or ==)"),
        ("a <= ", "the rule ends too early at position 6"),
        ("a $ 3", "unexpected character '$' at position 3"),
        ("a / b + c <= 1", "a ratio must stand alone on one side of the comparison"),
        ("a / b <= c", "a ratio must be compared with a number"),
        ("a / 0 <= 1", "division by zero at position 3"),
        ("a - a <= 1", "the rule names no factor (or its factors cancel out)"),
        ("1 <= a >= 0", "a chained rule must read low <= expr <= high"),
        ("", "the rule is empty"),
        ("(a + b <= 1", "expected ')' at position"),
        ("a <= 1 <= 2 <= 3", "at most two comparisons may be chained"),
    ],
)
def test_bad_rules_are_named(text, message):
    with pytest.raises(RuleSyntaxError, match=re.escape(message)):
        parse_rule(text)


def test_no_eval_of_python():
    # a Python expression that eval() would run is just a syntax error here
    with pytest.raises(RuleSyntaxError):
        parse_rule("__import__('os').system('true') <= 1")
