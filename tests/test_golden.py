"""The example protocols' plans, byte for byte, at their own seeds.

These hashes were recorded before the modules were rearranged into one
import root (``guardband``) and must not change when code only moves: the
plan table, the exclusion table and the canonical JSON of the decision-log
record body (which holds neither a time nor a path of this machine). A
change of behaviour that is meant (a new screen rule, say) updates them in
the same commit and says why.

Changes so far: the record body gained ``calibration_earned`` (the
campaign's own planned runs against their promise); tables unchanged.
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
        "ec2639c8781dc4df2b581fc37244987edb4c1105d5b3d9621cc93c259b0659bd",
        "870d384a7a4450f7ef5c79520dd75213f6d08a173d1f10d75592b72711065e9c",
        "f6ec8a1968780b70efefbedb9eeb4872f212608fda0be885ff0598957e4eb9e2",
    ),
    "dose_combination": (
        "c8f5f8c818b11b60fd74546b83f8bda318095061ba63f66600c65ae9e9da6a7e",
        "1e804bda84b354d5b60a0f870c8ca91df61ec47fb0285c851f592613da6aca26",
        "24656ba9390bd03ad133d98e92cfef7e978f1753924144ae4fb3ab7749583c96",
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
