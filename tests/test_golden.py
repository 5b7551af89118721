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
limit in a batch) changed the plans of both examples, as they were meant to.
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
        "2e8a2eba462d9add95998c351f42c4922601d6bb44bdb3637bfe96b316070ef1",
        "307ebc31c901c5dc5c2d45df7bbf025600e8810533469ee5cb3bc221bc61f6f5",
        "9f92e398f7074ebfb02b3a02d62008f3ab5ba079f167202b1146b98403d3c400",
    ),
    "dose_combination": (
        "fcf83b7caf8965af4668b0195d4b658f75677733a4789fab59fdb6ae16aefd1d",
        "7885efab293973fc10bac01f80357a87bf525063edd19a9e064ce6340ef9691f",
        "fa0483b94401d5a75fc1948171dbebd6159a2746ef6b769bdedf2c27acfb2996",
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
