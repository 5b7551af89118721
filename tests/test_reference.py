"""The protocol reference and JSON Schema (docs/), made from the pydantic models, and the message traps.

The JSON Schema is checked with the ``jsonschema`` library (Draft 2020-12
validator), a reference implementation independent of pydantic.

Which bad protocols are schema errors. A file of the corpus is a *schema
error* when what is wrong is stated by a single setting's declaration: a
required key missing, an unknown key, a value of the wrong type, a value
outside a declared range or not among a setting's allowed values. pydantic
reports these with field-level error types (``missing``,
``extra_forbidden``, ``literal_error``, ``*_parsing``, ``greater_than``,
...), and the JSON Schema states the same. It is a *semantic* error when it
needs more than one setting or more than the schema knows: a model validator
(``value_error``: reversed bounds, a discrete factor without levels,
duplicate names, mixture bounds that cannot reach the total, NaN bounds) or
a check after validation (rules that do not parse or name unknown factors,
an empty design space, a start region outside it). A file that is not TOML
at all is neither. The tests below hold the corpus to exactly this rule:
the schema rejects every schema error and accepts every semantic one.
"""

from __future__ import annotations

import json
import tomllib
import typing
from pathlib import Path

import pytest
from pydantic import BaseModel, ValidationError
from typer.testing import CliRunner

from guardband.planner.app.workflow import check_protocol
from guardband.planner.cli import app
from guardband.planner.errors import ProtocolError
from guardband.planner.inputs.protocol import Protocol, parse_protocol
from guardband.planner.inputs.reference import (protocol_json_schema, protocol_json_schema_text,
                                               protocol_reference_markdown)

jsonschema = pytest.importorskip("jsonschema")

ROOT = Path(__file__).resolve().parents[1]
DOCS = ROOT / "docs"
BAD = ROOT / "tests" / "bad_inputs"
EXAMPLES = sorted((ROOT / "protocols").glob("*.toml"))

SCHEMA_ERRORS = {
    "protocol_empty.toml", "protocol_missing_objective.toml", "protocol_probability_out_of_range.toml",
    "protocol_threshold_out_of_range.toml", "protocol_unknown_factor_key.toml",
    "protocol_unknown_factor_kind.toml", "protocol_unknown_top_key.toml", "protocol_wrong_type.toml",
    "protocol_seed_under_batch.toml",
}
SEMANTIC_ERRORS = {
    "protocol_components_without_mixture.toml", "protocol_discrete_without_levels.toml",
    "protocol_division_by_negative.toml", "protocol_duplicate_factor.toml",
    "protocol_empty_design_space.toml", "protocol_levels_unsorted.toml", "protocol_limit_reversed.toml",
    "protocol_mixture_highs_below_total.toml", "protocol_mixture_lows_exceed_total.toml",
    "protocol_nan_bound.toml", "protocol_reserved_name.toml", "protocol_reversed_bounds.toml",
    "protocol_rule_syntax.toml", "protocol_start_region_outside.toml",
    "protocol_unknown_name_in_constraint.toml", "protocol_percent_bounds.toml",
    "protocol_rule_name_with_space.toml",
}
NOT_TOML = {"protocol_malformed.toml", "protocol_not_utf8.toml", "protocol_table_twice.toml"}


def _validator():
    schema = protocol_json_schema()
    jsonschema.Draft202012Validator.check_schema(schema)
    return jsonschema.Draft202012Validator(schema)


def _toml(path: Path) -> dict:
    return tomllib.loads(path.read_bytes().decode("utf-8"))


# ------------------------------------------------------------------ the committed files
def test_committed_reference_is_what_the_generator_writes():
    assert (DOCS / "protocol-reference.md").read_text(encoding="utf-8") == protocol_reference_markdown(), \
        "docs/protocol-reference.md is stale: run `guardband reference --out docs/protocol-reference.md`"


def test_committed_schema_is_what_the_generator_writes():
    assert (DOCS / "protocol.schema.json").read_text(encoding="utf-8") == protocol_json_schema_text(), \
        "docs/protocol.schema.json is stale: run `guardband reference -f json-schema --out docs/protocol.schema.json`"


def test_the_reference_says_when_an_empty_design_space_is_found(tmp_path):
    """The protocol is read without complaint; the commands that use it refuse it, naming the file."""
    bad = BAD / "protocol_empty_design_space.toml"
    parse_protocol(_toml(bad))  # reading does not look for an empty design space
    res = CliRunner().invoke(app, ["check", str(bad)])
    assert res.exit_code == 3 and "protocol_empty_design_space.toml: the design space is empty" in res.stderr
    text = " ".join(protocol_reference_markdown().split())
    read_checks = text[:text.index("made when the protocol is read")]
    assert "empty" not in read_checks[read_checks.rindex("Cross-checks"):]
    assert "`check`, `start`, `plan` and `judge` refuse an empty one" in text


def test_reference_command_writes_both(tmp_path):
    runner = CliRunner()
    res = runner.invoke(app, ["reference"])
    assert res.exit_code == 0 and res.stdout == protocol_reference_markdown()
    out = tmp_path / "schema.json"
    res = runner.invoke(app, ["reference", "--format", "json-schema", "--out", str(out)])
    assert res.exit_code == 0, res.output
    assert json.loads(out.read_text(encoding="utf-8")) == protocol_json_schema()
    assert runner.invoke(app, ["reference", "--format", "html"]).exit_code == 2


# ------------------------------------------------------------------ every setting, with its default
def _table_model(annotation):
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return annotation
    for arg in typing.get_args(annotation):
        found = _table_model(arg)
        if found is not None:
            return found
    return None


def _settings():
    """(section heading, key, FieldInfo) of every leaf setting, walked from the models themselves."""
    out, tables = [], [("Top-level keys", Protocol)]
    for heading, model in tables:
        for key, field in model.model_fields.items():
            sub = _table_model(field.annotation)
            if sub is None:
                out.append((heading, key, field))
                continue
            many = typing.get_origin(field.annotation) is tuple
            path = key if heading == "Top-level keys" else f"{heading.strip('`[]')}.{key}"
            tables.append((f"`[[{path}]]`" if many else f"`[{path}]`", sub))
    return out


def _row(markdown: str, heading: str, key: str) -> list[str]:
    section = markdown.split(f"\n## {heading}\n", 1)[1].split("\n## ", 1)[0]
    rows = [line for line in section.splitlines() if line.startswith(f"| `{key}` |")]
    assert len(rows) == 1, f"{heading}: {key} appears {len(rows)} times"
    return [c.strip() for c in rows[0].strip("|").split(" | ")]


def test_every_setting_appears_with_its_default():
    md = protocol_reference_markdown()
    settings = _settings()
    assert len(settings) >= 50  # every table of the protocol, not a handful
    for heading, key, field in settings:
        cells = _row(md, heading, key)
        default = cells[2]
        if field.is_required():
            assert default == "required", (heading, key)
            continue
        assert default.startswith("`") and default.endswith("`"), (heading, key, default)
        text = default.strip("`")
        if field.default is None:
            assert text == "not set", (heading, key, text)
        else:  # the default as written in the reference reads back, as TOML, to the model's default
            value = tomllib.loads(f"v = {text}")["v"]
            expected = list(field.default) if isinstance(field.default, tuple) else field.default
            assert value == expected and type(value) is type(expected), (heading, key, text)
        assert cells[5], f"{heading}: {key} has no description"


def test_allowed_values_and_units_in_the_reference():
    md = protocol_reference_markdown()
    for heading, key, choices in [("`[objective]`", "direction", ("maximize", "minimize")),
                                  ("`[ranking]`", "rule", ("ei", "pi", "bound", "mean")),
                                  ("`[screen]`", "joint", ("bound", "independent")),
                                  ("`[[limits]]`", "judged_on", ("measurement", "true-value"))]:
        assert all(f'`"{c}"`' in _row(md, heading, key)[4] for c in choices), (heading, key)
    assert "sqrt(number of free factors)" in _row(md, "`[screen]`", "max_step")[3]
    assert _row(md, "`[[limits]]`", "probability")[4] == "> 0, < 1"
    assert _row(md, "`[batch]`", "pool")[4] == ">= 50, <= 500000"


# ------------------------------------------------------------------ the JSON Schema
@pytest.mark.parametrize("path", EXAMPLES + [BAD / "good_blend.toml", BAD / "good_dose.toml"], ids=lambda p: p.name)
def test_schema_accepts_the_good_protocols(path):
    errors = list(_validator().iter_errors(_toml(path)))
    assert not errors, [e.message for e in errors]


def test_corpus_is_classified_whole():
    corpus = {p.name for p in BAD.glob("protocol_*.toml")}
    assert corpus == SCHEMA_ERRORS | SEMANTIC_ERRORS | NOT_TOML
    assert not (SCHEMA_ERRORS & SEMANTIC_ERRORS)


@pytest.mark.parametrize("name", sorted(SCHEMA_ERRORS))
def test_schema_rejects_each_schema_error(name):
    data = _toml(BAD / name)
    assert list(_validator().iter_errors(data)), f"{name} passed the JSON Schema"
    with pytest.raises(ValidationError) as info:
        Protocol.model_validate(data)
    assert all(e["type"] != "value_error" for e in info.value.errors()), info.value.errors()


@pytest.mark.parametrize("name", sorted(SEMANTIC_ERRORS))
def test_schema_leaves_semantic_errors_to_the_reader(name):
    data = _toml(BAD / name)
    assert not list(_validator().iter_errors(data)), f"{name} is a schema error after all"
    try:
        report = check_protocol(BAD / name)
    except ProtocolError:
        return
    assert report.empty, f"{name} was accepted whole"  # an empty design space or start region


@pytest.mark.parametrize("name", sorted(NOT_TOML))
def test_files_that_are_not_toml(name):
    with pytest.raises((tomllib.TOMLDecodeError, UnicodeDecodeError)):
        _toml(BAD / name)


# ------------------------------------------------------------------ the message traps
def _blend() -> dict:
    return _toml(ROOT / "protocols" / "tablet_blend.toml")


def _message(data: dict) -> str:
    with pytest.raises(ProtocolError) as info:
        parse_protocol(data, source="p.toml")
    return str(info.value)


def test_seed_under_batch_says_where_it_belongs():
    data = _blend()
    data["batch"]["seed"] = data.pop("seed")
    msg = _message(data)
    assert "batch.seed: unknown key" in msg and "belongs in the top level" in msg
    assert "above the first heading" in msg


def test_key_in_another_table_and_a_misspelling():
    data = _blend()
    data["screen"]["kappa"] = 2.0
    assert "`kappa` belongs in [ranking], not in [screen]" in _message(data)
    data = _blend()
    data["screen"]["treshold"] = 0.9
    assert "screen.treshold: unknown key; did you mean `threshold`?" in _message(data)


def test_a_choice_in_capitals_or_cut_short_gets_the_choice_it_means():
    data = _blend()
    data["objective"]["direction"] = "max"
    data["ranking"]["rule"] = "EI"
    msg = _message(data)
    assert 'objective.direction: Input should be \'maximize\' or \'minimize\'; did you mean "maximize"?' in msg
    assert 'ranking.rule: Input should be \'ei\', \'pi\', \'bound\' or \'mean\'; did you mean "ei"?' in msg
    data["objective"]["direction"], data["ranking"]["rule"] = "maximize", "ei"
    assert parse_protocol(data).ranking.rule == "ei"


def test_percent_bounds_get_one_hint_to_set_total_100():
    data = _blend()
    for f in data["factors"]:
        if f["kind"] == "component":
            f["lower"], f["upper"] = 100 * f["lower"], 100 * f["upper"]
    data["constraints"][1]["rule"] = "croscarmellose + povidone <= 12"
    msg = _message(data)
    assert msg.count("\n") == 0 and msg.count("total = 100") == 1, msg
    data["mixture"]["total"] = 100.0
    data["mixture"]["tolerance"] = 0.2
    assert parse_protocol(data).mixture.total == 100.0  # what the hint says, accepted


@pytest.mark.parametrize("table", ["forbidden", "start"])
def test_a_name_with_a_space_in_a_region_rule_gets_its_quoting(table):
    """Regions hold a list of rules (a constraint holds one); the hint quotes the one to change."""
    data = _blend()
    data["factors"][1]["name"] = "mcc grade"
    data["constraints"][0]["rule"] = "`mcc grade` / lactose <= 4"
    if table == "forbidden":
        data["screen"]["forbidden"] = [{"name": "x", "rules": ["mcc grade >= 0.5", "force >= 15"]}]
    else:
        data["start"] = {"rules": ["mcc grade <= 0.5", "force <= 15"]}
    msg = _message(data)
    assert 'backquotes: write "`mcc grade` ' in msg and "force" not in msg.split("write", 1)[1], msg


@pytest.mark.parametrize("name", ["mcc powder", "mcc [pH]", "mcc-101", "lactose-free mcc"])
def test_a_name_with_a_space_or_sign_gets_a_quoting_that_is_accepted(name):
    data = _blend()
    data["factors"][1]["name"] = name
    data["constraints"][0]["rule"] = f"{name} / lactose <= 4"
    msg = _message(data)
    assert "backquotes" in msg, msg
    suggested = msg.split('write "', 1)[1].rsplit('"', 1)[0]
    assert suggested == f"`{name}` / lactose <= 4"
    data["constraints"][0]["rule"] = suggested
    protocol = parse_protocol(data)
    assert protocol.constraints[0].parsed[0].names == (name, "lactose")
