"""Caution texts: what every output carries, and the stronger dose-study set."""

from __future__ import annotations

import json
import re

import pytest

from guardband.planner.app.fileio import write_csv_text
from guardband.safety import cautions
from guardband.safety.cautions import DOSE, GENERAL, STUDY_KINDS, as_json, as_text, cautions_for

ALL = GENERAL + DOSE


def test_formulation_gets_the_general_cautions():
    assert cautions_for("formulation") == GENERAL


def test_dose_gets_the_general_ones_first_then_the_dose_ones():
    texts = cautions_for("dose")
    assert texts[: len(GENERAL)] == GENERAL
    assert texts[len(GENERAL):] == DOSE
    assert len(DOSE) >= 3


# The points each set must make (DESIGN.md, "Cautions"; REFERENCES.md:
# "Every limit that reaches a user carries the caution that the applicable
# regulation, pharmacopoeia and the user's own quality unit decide").
GENERAL_POINTS = [
    "decision support only",
    "qualified person reviews every proposed run",
    "regulations",
    "pharmacopoeia",
    "local codes",
    "quality unit",
    "models are adequate",
    "model diagnostics",
    "not guarantees",
]
DOSE_POINTS = [
    "ethics committee",
    "regulator",
    "before it starts",
    "not for dosing patients",
    "any person",
    "dose-escalation decision",
    "qualified investigators",
    "safety review committee",
]


@pytest.mark.parametrize("point", GENERAL_POINTS)
def test_general_cautions_make_each_point(point):
    assert point in " ".join(GENERAL).lower()


@pytest.mark.parametrize("point", DOSE_POINTS)
def test_dose_cautions_make_each_point(point):
    assert point in " ".join(cautions_for("dose")).lower()
    assert point not in " ".join(cautions_for("formulation")).lower()


def test_the_tool_proposes_and_estimates_people_decide():
    text = " ".join(ALL).lower()
    assert "proposes" in text and "estimates" in text
    assert "does not make decisions" in text


# Words that would make the tool sound like the one who decides or vouches.
AUTHORITY_WORDS = ["recommend", "approved by guardband", "is safe", "are safe", "guarantee that",
                   "certif", "you must", "we decide", "confirmed safe", "validated"]


@pytest.mark.parametrize("caution", ALL, ids=[f"caution-{i}" for i in range(len(ALL))])
def test_wording_never_claims_authority(caution):
    lowered = caution.lower()
    assert not [word for word in AUTHORITY_WORDS if word in lowered]


@pytest.mark.parametrize("caution", ALL, ids=[f"caution-{i}" for i in range(len(ALL))])
def test_each_caution_is_one_plain_sentence_line(caution):
    # One line each, so a caution can be a CSV "# " comment line or a list item.
    assert "\n" not in caution and "\r" not in caution
    assert caution == caution.strip() and caution.endswith(".")
    assert caution[0].isupper()


def test_unknown_study_kind_is_refused():
    message = "study_kind must be one of 'formulation', 'dose', got 'tablet'"
    for function in (cautions_for, as_text, as_json):
        with pytest.raises(ValueError, match=re.escape(message)):
            function("tablet")
    assert STUDY_KINDS == ("formulation", "dose")


@pytest.mark.parametrize("kind", STUDY_KINDS)
def test_as_text_one_caution_per_line(kind):
    assert as_text(kind).split("\n") == list(cautions_for(kind))
    prefixed = as_text(kind, prefix="# ")
    assert prefixed.split("\n") == ["# " + c for c in cautions_for(kind)]
    assert not prefixed.endswith("\n")


@pytest.mark.parametrize("kind", STUDY_KINDS)
def test_as_json_is_a_fresh_list(kind):
    first = as_json(kind)
    assert first == list(cautions_for(kind))
    assert json.loads(json.dumps(first)) == first
    first.append("changed")
    assert as_json(kind) == list(cautions_for(kind))


def test_constants_cannot_be_changed_in_place():
    assert isinstance(cautions.GENERAL, tuple) and isinstance(cautions.DOSE, tuple)


def test_cautions_as_csv_comment_lines():
    text = write_csv_text([[0.5, 1.0]], ["dose_mg_per_kg", "score"], comment_lines=cautions_for("dose"))
    lines = text.split("\n")
    n = len(cautions_for("dose"))
    assert lines[:n] == ["# " + c for c in cautions_for("dose")]
    assert lines[n:] == ["dose_mg_per_kg,score", "0.5,1.0", ""]
