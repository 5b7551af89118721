"""Protocol validation: good files load, bad ones are refused with the field path."""

import copy
import re
import tomllib

import pytest

from guardband.planner.errors import ProtocolError
from guardband.planner.inputs.protocol import load_protocol, parse_protocol

BASE = {
    "study": {"title": "t", "version": "1", "author": "me"},
    "mixture": {"total": 1.0},
    "factors": [
        {"name": "a", "kind": "component", "lower": 0.1, "upper": 0.7},
        {"name": "b", "kind": "component", "lower": 0.2, "upper": 0.8},
        {"name": "t", "kind": "continuous", "lower": 10, "upper": 30, "unit": "C"},
    ],
    "constraints": [{"name": "ratio", "rule": "a <= 2 * b"}],
    "objective": {"name": "y", "direction": "maximize"},
    "limits": [{"name": "imp", "upper": 0.15, "probability": 0.95}],
    "screen": {"threshold": 0.9},
}


def edited(path, value):
    data = copy.deepcopy(BASE)
    node = data
    for key in path[:-1]:
        node = node[key]
    if value is _DELETE:
        del node[path[-1]]
    else:
        node[path[-1]] = value
    return data


_DELETE = object()


def test_base_is_valid():
    p = parse_protocol(BASE)
    assert p.factor_names == ("a", "b", "t")
    assert p.limits[0].sides == "upper"


@pytest.mark.parametrize(
    "path, value, message",
    [
        (("screen", "treshold"), 0.9, "protocol: screen.treshold: unknown key"),
        (("factors", 0, "upper"), 0.05, "protocol: factors[0]: bounds of 'a' are reversed: lower = 0.1 is above upper = 0.05"),
        (("limits", 0, "probability"), 1.0, "protocol: limits[0].probability: Input should be less than 1"),
        (("limits", 0, "probability"), 0.0, "protocol: limits[0].probability: Input should be greater than 0"),
        (("screen", "threshold"), 1.5, "protocol: screen.threshold: Input should be less than 1"),
        (("mixture", "total"), 0.25, "mixture: the component lower bounds add up to 0.3, more than the total 0.25; lower some bounds"),
        (("factors", 1, "upper"), 0.25, "mixture: the component upper bounds add up to 0.95, less than the total 1"),
        (("limits", 0, "upper"), _DELETE, "limit 'imp' needs `upper`, `lower` or both"),
        (("objective", "direction"), "up", "protocol: objective.direction: Input should be 'maximize' or 'minimize'"),
        (("screen",), _DELETE, "protocol: screen: this field is required"),
        (("factors", 2, "kind"), "discrete", "discrete factor 't' needs `levels`"),
    ],
    ids=["unknown-key", "reversed-bounds", "probability-1", "probability-0", "threshold",
         "mixture-lower", "mixture-upper", "limit-without-side", "direction", "missing-screen",
         "discrete-without-levels"],
)
def test_bad_protocols_name_the_field(path, value, message):
    with pytest.raises(ProtocolError, match=re.escape(message)):
        parse_protocol(edited(path, value))


def test_constraint_naming_unknown_factor():
    data = edited(("constraints", 0, "rule"), "a <= 2 * bb")
    msg = "protocol: constraints[0].rule: rule 'a <= 2 * bb' names unknown factor(s) 'bb'; known factors: a, b, t"
    with pytest.raises(ProtocolError, match=re.escape(msg)):
        parse_protocol(data)


def test_constraint_syntax_error_has_path_and_position():
    data = edited(("constraints", 0, "rule"), "a * b <= 1")
    with pytest.raises(ProtocolError, match=re.escape("constraints[0].rule: cannot read the rule: the product of two factors is not linear at position 3")):
        parse_protocol(data)


def test_ratio_with_possibly_negative_divisor_is_refused():
    data = copy.deepcopy(BASE)
    data["factors"][2]["lower"] = -5
    data["constraints"] = [{"rule": "a / t <= 1"}]
    with pytest.raises(ProtocolError, match=re.escape("divides by a quantity that can be negative")):
        parse_protocol(data)


def test_duplicate_names_refused():
    data = copy.deepcopy(BASE)
    data["limits"][0]["name"] = "a"
    with pytest.raises(ProtocolError, match=re.escape("name 'a' is used for a factor and a response")):
        parse_protocol(data)


def test_fingerprint_ignores_layout_but_not_content(tmp_path):
    text = (tmp_path / "p.toml")
    src = (__import__("pathlib").Path(__file__).parents[1] / "protocols" / "tablet_blend.toml").read_text()
    text.write_text(src)
    reordered = tmp_path / "q.toml"
    # same content, comments removed and whitespace changed
    reordered.write_text("\n".join(line.split("#")[0].rstrip() for line in src.splitlines()) + "\n\n")
    a, b = load_protocol(text), load_protocol(reordered)
    assert a.fingerprint == b.fingerprint
    changed = tmp_path / "r.toml"
    changed.write_text(src.replace("threshold = 0.90", "threshold = 0.91"))
    assert load_protocol(changed).fingerprint != a.fingerprint


def test_toml_syntax_error_names_file(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("[study\ntitle = 1\n")
    with pytest.raises(ProtocolError, match=re.escape("bad.toml: not valid TOML")):
        load_protocol(bad)


def test_missing_file(tmp_path):
    with pytest.raises(ProtocolError, match=re.escape("cannot read the protocol file")):
        load_protocol(tmp_path / "nope.toml")


@pytest.mark.parametrize("name", ["tablet_blend.toml", "dose_combination.toml"])
def test_example_protocols_load(name):
    from conftest import PROTOCOLS

    p = load_protocol(PROTOCOLS / name)
    assert tomllib.loads((PROTOCOLS / name).read_text())["study"]["title"] == p.study.title
    assert len(p.fingerprint) == 64


def test_protocol_is_frozen():
    p = parse_protocol(BASE)
    with pytest.raises(Exception):
        p.screen.threshold = 0.5  # noqa: pydantic frozen models refuse assignment
