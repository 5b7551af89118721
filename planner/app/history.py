"""A campaign's own history: its planned runs, as measured, against what they were promised.

A planned run is linked to its promise by its run id (``P<label>-<rank>``,
the plan table's ``run_id`` column): a run of the runs file with that id
and every limited response measured counts, if it was made as proposed
(each factor within half its resolution or ``settings.AS_PROPOSED_RTOL`` of
its declared span of the proposal; a discrete factor at the proposed
level); one made otherwise is named and not counted, for its promise was
made for another recipe. Whether it broke a limit is
judged on its measured values by the screen's own rule
(:func:`guardband.safety.limits.meets_limits`); a limit judged on the true
value is still checked here on the measurement, which is what the lab saw.
"""

from __future__ import annotations


import numpy as np

from guardband.planner import settings
from guardband.planner.inputs.protocol import Protocol
from guardband.planner.inputs.runs import RunsTable
from guardband.safety import ledger
from guardband.safety.calibration import EarnedCalibration, earned_calibration
from guardband.safety.limits import limit_rules, meets_limits

__all__ = ["promised_runs", "campaign_calibration"]


def promised_runs(records: list[dict]) -> dict[str, tuple[float, dict]]:
    """Run id -> (the joint figure it was proposed with, its settings), over the plan records
    not superseded."""
    out: dict[str, tuple[float, dict]] = {}
    for rec in ledger.effective_records(records):
        body = rec.get("body", {})
        if rec.get("kind") != "plan" or rec.get("superseded_by") is not None:
            continue
        label = body.get("step_label")
        for prop in body.get("proposals", []):
            out[f"{label}-{int(prop['rank']):02d}"] = (float(prop["joint"]), dict(prop.get("x", {})))
    return out


def _not_as_proposed(protocol: Protocol, x, proposed: dict) -> str:
    """What differs between a run's settings and its proposal's ("" when it was made as proposed)."""
    out = []
    for f, v in zip(protocol.factors, x):
        p = proposed.get(f.name)
        if p is None:
            continue
        if f.kind == "discrete":
            tol = settings.FACTOR_VALUE_RTOL * max(1.0, abs(p))
        else:
            tol = max(0.5 * (f.resolution or 0.0), settings.AS_PROPOSED_RTOL * (f.high - f.low))
        if abs(v - p) > tol * (1.0 + 1e-9):
            out.append(f"{f.name} {v:.6g} against {p:.6g}")
    return ", ".join(out)


def campaign_calibration(records: list[dict], protocol: Protocol, runs: RunsTable) -> EarnedCalibration:
    """The calibration earned so far by the planned runs of the log's ``records``."""
    promised = promised_runs(records)
    rules = limit_rules(protocol)
    measured = ~runs.pending
    for rule in rules:
        measured &= runs.measured(rule.name)
    rows, changed = [], []
    for i, rid in enumerate(runs.run_ids):
        if rid in promised and measured[i]:
            what = _not_as_proposed(protocol, runs.X[i], promised[rid][1])
            if what:
                changed.append((rid, what))
            else:
                rows.append(i)
    idx = np.array(rows, dtype=int)
    Y = {r.name: runs.Y[r.name][idx] for r in rules}
    broke = ~meets_limits(rules, Y, idx.size)
    return earned_calibration([promised[runs.run_ids[i]][0] for i in rows], broke,
                              [runs.run_ids[i] for i in rows], changed)
