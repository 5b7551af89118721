"""The scenario formula parser: a corpus of valid formulas against numpy, hostile ones refused with position."""

from __future__ import annotations

import builtins
import math

import numpy as np
import pytest

from guardband.planner.simulation.formulas import MAX_DEPTH, MAX_LENGTH, FormulaError, parse_formula

NAMES = ("a", "b", "dose_a")
A = np.array([0.5, 1.0, 2.0, 3.5])
B = np.array([1.0, 0.25, 4.0, 2.0])
D = np.array([10.0, 0.0, 5.0, 80.0])
COLS = {"a": A, "b": B, "dose_a": D}

# Each formula beside the same quantity written directly in numpy (the reference).
VALID = [
    ("1", np.ones(4)),
    ("a", A),
    ("2.5e-1 * a", 0.25 * A),
    (".5 + a", 0.5 + A),
    ("a + b * 2", A + B * 2),
    ("(a + b) * 2", (A + B) * 2),
    ("a - b - 1", A - B - 1),  # left to right
    ("a / b / 2", A / B / 2),  # left to right
    ("2 ^ 3 ^ 2", np.full(4, 2.0 ** 9)),  # right-associative
    ("-a ^ 2", -(A ** 2)),  # the power binds tighter than the sign
    ("(-a) ^ 2", A ** 2),
    ("a ^ -1", A ** -1.0),
    ("--a", A),
    ("+a", A),
    ("exp(a) + log(b) - sqrt(a)", np.exp(A) + np.log(B) - np.sqrt(A)),
    ("abs(a - 2)", np.abs(A - 2)),
    ("min(a, b)", np.minimum(A, B)),
    ("max(a, b, 1.5)", np.maximum(np.maximum(A, B), 1.5)),
    ("logistic(-3.8 + 0.05 * dose_a)", 1 / (1 + np.exp(-(-3.8 + 0.05 * D)))),
    ("logistic(1000) + logistic(-1000)", np.ones(4)),  # no overflow
    ("40 * dose_a / (dose_a + 15)", 40 * D / (D + 15)),
    ("`a` * `dose_a`", A * D),
    ("  a\t+\nb  ", A + B),
]


@pytest.mark.parametrize(("text", "expected"), VALID, ids=[t for t, _ in VALID])
def test_valid_formulas_match_numpy(text, expected):
    f = parse_formula(text, NAMES)
    np.testing.assert_allclose(f(COLS), expected, rtol=1e-14, atol=0)


def test_names_in_order_of_first_use():
    assert parse_formula("b * a + max(b, dose_a)", NAMES).names == ("b", "a", "dose_a")


def test_a_long_flat_sum_is_read_and_evaluated():
    text = "a" + " + a" * 499  # long, but flat: no deep tree
    assert len(text) <= MAX_LENGTH
    np.testing.assert_allclose(parse_formula(text, NAMES)(COLS), 500 * A)


def test_outside_a_domain_gives_nan_or_inf_not_an_exception():
    f = parse_formula("log(a - 1) + sqrt(b - 1) + 1 / (a - 1)", NAMES)
    v = f(COLS)
    assert not np.isfinite(v[0]) and not np.isfinite(v[1])


# Each hostile or broken formula beside the 1-based position the message must name.
HOSTILE = [
    ("__import__('os').system('x')", 12, "unexpected character"),
    ("a.b", 2, "unexpected character"),
    ("a ** 2", 4, "expected a number"),
    ("a; b", 2, "unexpected character"),
    ("a = 1", 3, "unexpected character"),
    ("[a]", 1, "unexpected character"),
    ("lambda: 1", 7, "unexpected character"),
    ("os", 1, "unknown name 'os'"),
    ("eval(a)", 1, "unknown function 'eval'"),
    ("open(a)", 1, "unknown function 'open'"),
    ("exp a", 1, "needs its argument in parentheses"),
    ("2a", 2, "runs into a name"),
    ("a +", 4, "the end of the formula"),
    ("(a + b", 7, "expected ')'"),
    ("a + b)", 6, "unexpected ')'"),
    ("max(a)", 1, "at least 2"),
    ("log(a, b)", 1, "takes 1"),
    ("1e999", 1, "too large"),
    ("a @ b", 3, "unexpected character"),
    ("'a'", 1, "unexpected character"),
    ("a\x00", 2, "unexpected character"),
    ("``", 1, "empty quoted name"),
    ("x + a", 1, "unknown name 'x'"),
    ("a b", 3, "unexpected 'b'"),
    ("min(a,, b)", 7, "expected a number"),
]


@pytest.mark.parametrize(("text", "position", "message"), HOSTILE, ids=[t for t, _, _ in HOSTILE])
def test_hostile_and_broken_formulas_are_refused_with_their_position(text, position, message):
    with pytest.raises(FormulaError) as info:
        parse_formula(text, NAMES)
    assert info.value.position == position
    assert message in str(info.value) and f"position {position}" in str(info.value)


def test_length_and_depth_limits():
    with pytest.raises(FormulaError, match="characters long"):
        parse_formula("a" + "+a" * MAX_LENGTH, NAMES)
    deep = "(" * (MAX_DEPTH + 1) + "a" + ")" * (MAX_DEPTH + 1)
    with pytest.raises(FormulaError, match="nests deeper"):
        parse_formula(deep, NAMES)
    ok = "(" * (MAX_DEPTH - 1) + "a" + ")" * (MAX_DEPTH - 1)
    np.testing.assert_allclose(parse_formula(ok, NAMES)(COLS), A)
    with pytest.raises(FormulaError, match="nests deeper"):
        parse_formula("-" * (MAX_DEPTH + 1) + "a", NAMES)
    with pytest.raises(FormulaError, match="nests deeper"):
        parse_formula("exp(" * (MAX_DEPTH + 1) + "a" + ")" * (MAX_DEPTH + 1), NAMES)
    with pytest.raises(FormulaError, match="empty"):
        parse_formula("   ", NAMES)


def test_python_never_evaluates_the_text(monkeypatch):
    def refuse(*args, **kwargs):
        raise AssertionError("Python's own evaluator was called")

    for name in ("eval", "exec", "compile", "__import__"):
        monkeypatch.setattr(builtins, name, refuse)
    f = parse_formula("max(a, b) ^ 2 + logistic(dose_a)", NAMES)
    v = f(COLS)
    assert math.isclose(v[2], 16.0 + 1 / (1 + math.exp(-5.0)))
    with pytest.raises(FormulaError):
        parse_formula("__import__('os')", NAMES)
