"""Escalation as the trade does it: no skipping of untried levels, one agent at a time, a cohort size.

Trade practice in dose escalation (the 3+3 design and its relatives): the
next cohort goes at most one level above the highest level given so far in
a cohort that met the limit, and a combination raises one agent at a time.
"""

from __future__ import annotations

import tomllib
from pathlib import Path

import numpy as np
import pytest

from guardband.planner.errors import ProtocolError
from guardband.planner.inputs.protocol import load_protocol, parse_protocol
from guardband.planner.inputs.runs import read_runs
from guardband.planner.step import plan_step
from guardband.safety.limits import ScreenRules
from guardband.safety.screen import skipped_levels

ROOT = Path(__file__).resolve().parents[1]
DOSE = ROOT / "protocols" / "dose_combination.toml"


def _skips(protocol, X, safe_runs):
    rules = ScreenRules.from_protocol(protocol)
    space = protocol.design_space()
    free = np.asarray(space.free, dtype=bool)
    unit = lambda A: np.asarray(space.to_unit(np.asarray(A, float)))[:, free]  # noqa: E731
    return skipped_levels(rules.ladders, unit(X), unit(safe_runs))


def test_one_level_at_a_time_and_one_agent_at_a_time():
    p = load_protocol(DOSE)  # levels a: 0 5 10 20 40 80; b: 0 1 2 4 8
    safe = [[10, 2], [5, 1]]
    X = [[20, 2], [40, 2], [20, 4], [10, 4], [10, 8], [5, 0], [20, 0]]
    out, detail = _skips(p, X, safe)
    assert out.tolist() == [False, True, True, False, True, False, False]
    assert "dose_a would rise 2 levels above 10" in detail[1]
    assert "dose_a and dose_b would both rise" in detail[2]
    assert "dose_b would rise 2 levels above 2" in detail[4]


def test_rule_off_without_escalation_table():
    data = tomllib.loads(DOSE.read_text())
    data.pop("escalation")
    p = parse_protocol(data)
    assert ScreenRules.from_protocol(p).ladders == ()
    out, _ = _skips(p, [[80, 8]], [[0, 0]])
    assert not out.any()


def test_no_skipping_needs_discrete_factors():
    data = tomllib.loads((ROOT / "protocols" / "tablet_blend.toml").read_text())
    data["escalation"] = {"no_skipping": True}
    with pytest.raises(ProtocolError, match="needs factors of kind"):
        parse_protocol(data)


def test_dose_example_plan_never_skips_and_states_the_cohort():
    p = load_protocol(DOSE)
    runs = read_runs(ROOT / "protocols" / "dose_combination_runs.csv", p)
    result = plan_step(p, runs, seed=3, pool_size=300)
    assert result.proposals
    X = np.array([q.x for q in result.proposals])
    safe = runs.X[runs.Y["dlt_rate"] <= 0.25]
    out, _ = _skips(p, X, safe)
    assert not out.any()
    assert any("one cohort of 6 subjects" in m for m in result.messages)
    assert result.counts()["skips-untried-level"] >= 1  # the rule did exclude something here
