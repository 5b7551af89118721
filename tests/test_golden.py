"""The example protocols' plans, byte for byte, at their own seeds.

These hashes were recorded before the modules were rearranged into one
import root (``guardband``) and must not change when code only moves: the
plan table, the exclusion table and the canonical JSON of the decision-log
record body (which holds neither a time nor a path of this machine). A
change of behaviour that is meant (a new screen rule, say) updates them in
the same commit and says why.

Changes so far: the record body gained ``calibration_earned`` (the
campaign's own planned runs against their promise); then the screen's new
guards (the single-run check, local one-sided widening, a limit model's
scale and signal floor, the tested span, limits fantasised towards the
limit in a batch) changed the plans of both examples, as they were meant to;
then a guarded limit model added its one noise variance instead of
predicting twice (the tablet plan's printed values are unchanged; six
exclusion-table probabilities moved by up to 0.003 where the two
predictions had come from different models of the pair). Then the dose
example's toxicity became a binomial limit (counts per cohort, a GP on the
logit of the rate, held monotone in the doses), which changed its plan on
purpose; the tablet example's plan did not change.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import pytest
from typer.testing import CliRunner

from guardband.planner.cli import app
from guardband.safety.canonical import canonical_json

ROOT = Path(__file__).resolve().parents[1]

# name: (plan table, exclusion table, record body), SHA-256
GOLDEN = {
    "tablet_blend": (
        "6fff0fd9ef93258c3cff525ef0beea5e8aa12f26317938441f11bdeddd565a4c",
        "c5c7af775356c9bf8a8a7a329dc8fccc337abb3c7fddbaccbcfced5204102bc0",
        "ea3f37314431b19d8ee4d17a07d7b5cc627954a3172480ffd83de3ed6ee0a923",
    ),
    "dose_combination": (
        # binomial toxicity limit (counts, logit GP, monotone): the plan changed on purpose
        "b1735ee04ec4a9932d0d4136fbe6dbf7138f26c98b18908971d1d1194d5f43bf",
        "2d42afcfdb4bdd5c23fb633973c8f0c06ecce6e78a3ad0953eb926087c17db94",
        "9abec043b4d537b7e4d6467518d9516c111d9651c80d972b1a65d50ccd5a7196",
    ),
}


def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


@pytest.mark.parametrize("name", sorted(GOLDEN))
def test_example_plans_are_byte_identical(tmp_path, name):
    out = tmp_path / name
    res = CliRunner().invoke(app, ["plan", str(ROOT / "protocols" / f"{name}.toml"),
                                   str(ROOT / "protocols" / f"{name}_runs.csv"), "--out", str(out)])
    assert res.exit_code == 0, res.output
    body = json.loads((out / "decisions.jsonl").read_text().splitlines()[0])["body"]
    got = (_sha((out / body["plan_table"]["file"]).read_bytes()),
           _sha((out / body["exclusion_table"]["file"]).read_bytes()),
           _sha(canonical_json(body)))
    assert got == GOLDEN[name]
