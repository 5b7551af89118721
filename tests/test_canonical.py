"""Canonical JSON: the RFC 8785 test vectors, numpy values, refusals, round trips."""

from __future__ import annotations

import json
import math
import re
import struct

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from guardband.safety import canonical
from guardband.safety.canonical import canonical_json, to_jsonable

def test_keys_sorted_and_no_whitespace():
    obj = {"b": 1, "a": {"d": [1, 2, {"z": None, "y": True}], "c": "x"}}
    assert canonical_json(obj) == b'{"a":{"c":"x","d":[1,2,{"y":true,"z":null}]},"b":1}'
    # Independent of the order keys were inserted in.
    assert canonical_json(dict(reversed(list(obj.items())))) == canonical_json(obj)


def test_rfc8785_section_3_2_2_example():
    # RFC 8785, 3.2.2 (published; input and output as in the reference
    # implementation's testdata/input/values.json and output/values.json).
    source = (
        '{"numbers": [1E30, 4.50, 333333333.33333329, 2e-3, 0.000000000000000000000000001],'
        ' "escaping": "\\u20ac$\\u000F\\u000aA\'\\u0042\\u0022\\u005c\\\\\\"\\/",'
        ' "literals": [null, true, false]}'
    )
    expected = (
        '{"escaping":"€$\\u000f\\nA\'B\\"\\\\\\\\\\"/","literals":[null,true,false],'
        '"numbers":[1e+30,4.5,333333333.3333333,0.002,1e-27]}'
    )
    assert canonical_json(json.loads(source)) == expected.encode("utf-8")


def test_rfc8785_section_3_2_3_key_order_is_utf16():
    # RFC 8785, 3.2.3 (published; testdata/input/weird.json and output/weird.json
    # of the reference implementation): keys sort by UTF-16 code units, so the
    # emoji (surrogates D83D DE02) comes before U+FB33.
    source = {
        "\u20ac": "Euro Sign",
        "1": "One",
        "\u0080": "Control\u007f",
        "\U0001F602": "Smiley",
        "\u00f6": "Latin Small Letter O With Diaeresis",
        "\ufb33": "Hebrew Letter Dalet With Dagesh",
        "</script>": "Browser Challenge",
    }
    expected = (
        '{"1":"One","</script>":"Browser Challenge","\u0080":"Control\u007f",'
        '"\u00f6":"Latin Small Letter O With Diaeresis","\u20ac":"Euro Sign",'
        '"\U0001F602":"Smiley","\ufb33":"Hebrew Letter Dalet With Dagesh"}'
    )
    assert canonical_json(source) == expected.encode("utf-8")


# RFC 8785, Appendix B (published, as copied in several public test suites):
# IEEE-754 bit pattern -> required text.
APPENDIX_B = [
    (0x0000000000000000, "0"),
    (0x8000000000000000, "0"),
    (0x0000000000000001, "5e-324"),
    (0x8000000000000001, "-5e-324"),
    (0x7FEFFFFFFFFFFFFF, "1.7976931348623157e+308"),
    (0xFFEFFFFFFFFFFFFF, "-1.7976931348623157e+308"),
    (0x4340000000000000, "9007199254740992"),
    (0xC340000000000000, "-9007199254740992"),
    (0x4430000000000000, "295147905179352830000"),
    (0x44B52D02C7E14AF5, "9.999999999999997e+22"),
    (0x44B52D02C7E14AF6, "1e+23"),
    (0x44B52D02C7E14AF7, "1.0000000000000001e+23"),
    (0x444B1AE4D6E2EF4E, "999999999999999700000"),
    (0x444B1AE4D6E2EF4F, "999999999999999900000"),
    (0x444B1AE4D6E2EF50, "1e+21"),
    (0x3EB0C6F7A0B5ED8C, "9.999999999999997e-7"),
    (0x3EB0C6F7A0B5ED8D, "0.000001"),
    (0x41B3DE4355555553, "333333333.3333332"),
    (0x41B3DE4355555554, "333333333.33333325"),
    (0x41B3DE4355555555, "333333333.3333333"),
    (0x41B3DE4355555556, "333333333.3333334"),
    (0x41B3DE4355555557, "333333333.33333343"),
    (0xBECBF647612F3696, "-0.0000033333333333333333"),
    (0x43143FF3C1CB0959, "1424953923781206.2"),
]


@pytest.mark.parametrize(("bits", "text"), APPENDIX_B, ids=[f"{b:016x}" for b, _ in APPENDIX_B])
def test_rfc8785_appendix_b_numbers(bits, text):
    value = struct.unpack(">d", bits.to_bytes(8, "big"))[0]
    assert canonical_json(value) == text.encode("ascii")


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf, np.float64("nan"), np.float32("inf")],
                         ids=["nan", "inf", "-inf", "np.nan", "np.float32-inf"])
def test_nan_and_infinity_refused_with_their_path(bad):
    with pytest.raises(ValueError, match=re.escape("$.fit.scores[1] is")):
        canonical_json({"fit": {"scores": [0.5, bad]}})


def test_awkward_key_paths_are_readable():
    with pytest.raises(ValueError, match=re.escape("$['impurity %'][0] is nan")):
        canonical_json({"impurity %": [math.nan]})


def test_numpy_values_become_python_values():
    obj = {
        "f": np.float64(0.25), "f32": np.float32(0.5), "i": np.int32(-3), "u": np.uint64(2**63),
        "b": np.bool_(True), "s": np.str_("x"), "a": np.array([[1.5, 2.0], [3.0, 4.25]]),
        "ai": np.arange(3), "t": (1, 2),
    }
    plain = {
        "f": 0.25, "f32": 0.5, "i": -3, "u": 2**63, "b": True, "s": "x",
        "a": [[1.5, 2.0], [3.0, 4.25]], "ai": [0, 1, 2], "t": [1, 2],
    }
    assert canonical_json(obj) == canonical_json(plain)
    converted = to_jsonable(obj)
    assert type(converted["f"]) is float and type(converted["i"]) is int
    assert type(converted["b"]) is bool and type(converted["s"]) is str


def test_nan_inside_an_array_is_refused():
    with pytest.raises(ValueError, match=re.escape("$.mean[1] is nan")):
        canonical_json({"mean": np.array([1.0, np.nan])})


def test_to_jsonable_does_not_change_its_input():
    arr = np.array([1.0, 2.0])
    obj = {"x": arr, "y": [1, {"z": 2}]}
    to_jsonable(obj)
    assert obj["x"] is arr and obj["y"] == [1, {"z": 2}]


@pytest.mark.parametrize(
    ("obj", "error", "message"),
    [
        ({1: "a"}, TypeError, "$ has a key 1 of type int"),
        ({"s": {1, 2}}, TypeError, "$.s is of type set"),
        ({"c": 1j}, TypeError, "$.c is of type complex"),
        ({"t": "\ud800"}, ValueError, "$.t holds text that is not valid Unicode"),
    ],
    ids=["int-key", "set", "complex", "lone-surrogate"],
)
def test_values_json_cannot_hold_are_refused(obj, error, message):
    with pytest.raises(error, match=re.escape(message)):
        canonical_json(obj)


def test_big_integers_are_written_exactly():
    # A documented difference from RFC 8785, which reads every number as a double.
    assert canonical_json(2**64 + 1) == b"18446744073709551617"


json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False, allow_infinity=False)
    | st.text(max_size=8),
    lambda children: st.lists(children, max_size=4) | st.dictionaries(st.text(max_size=6), children, max_size=4),
    max_leaves=20,
)


@settings(max_examples=150, deadline=None)
@given(json_values)
def test_canonical_form_is_stable_through_a_json_round_trip(value):
    text = canonical_json(value)
    assert canonical_json(json.loads(text)) == text
    assert _same_values(json.loads(text), value)


def _same_values(read, written) -> bool:
    # A float with an integral value below 1e21 is written without a point
    # (ECMAScript style: 1e16 -> "10000000000000000") and json.loads reads it
    # as an int; float() of that int is the same double again.
    if isinstance(written, float) and isinstance(read, int) and not isinstance(read, bool):
        return float(read) == written
    if isinstance(written, list):
        return isinstance(read, list) and len(read) == len(written) and all(
            _same_values(r, w) for r, w in zip(read, written))
    if isinstance(written, dict):
        return isinstance(read, dict) and read.keys() == written.keys() and all(
            _same_values(read[k], written[k]) for k in written)
    return type(read) is type(written) and read == written


@settings(max_examples=500, deadline=None)
@given(st.floats(allow_nan=False, allow_infinity=False))
def test_numbers_read_back_exactly_with_the_shortest_digits(x):
    text = canonical_json(x).decode()
    assert float(text) == x
    # Same significant digits as Python's repr (shortest round-trip digits).
    def digits(s):
        mantissa = s.lstrip("-").split("e")[0].replace(".", "")
        return mantissa.strip("0") or "0"
    assert digits(text) == digits(repr(x))


@settings(max_examples=500, deadline=None)
@given(st.floats(allow_nan=False, allow_infinity=False)
       | st.floats(min_value=1e-8, max_value=1e22) | st.integers(-10**6, 10**6).map(float))
def test_fast_number_path_agrees_with_the_full_algorithm(x):
    # Two paths that must agree: the repr shortcut for fixed notation and the
    # general ECMA-262 Number::toString layout.
    assert canonical._format_number(x) == canonical._format_number_general(x)
