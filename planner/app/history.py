"""A campaign's own history: its planned runs, as measured, against what they were promised.

A planned run is linked to its promise by its run id (``P<label>-<rank>``,
the plan table's ``run_id`` column): a run of the runs file with that id
and every limited response measured counts. Whether it broke a limit is
judged on its measured values by the screen's own rule
(:func:`guardband.safety.limits.meets_limits`); a limit judged on the true
value is still checked here on the measurement, which is what the lab saw.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from guardband.planner.inputs.protocol import Protocol
from guardband.planner.inputs.runs import RunsTable
from guardband.safety import ledger
from guardband.safety.calibration import EarnedCalibration, earned_calibration
from guardband.safety.limits import limit_rules, meets_limits

__all__ = ["promised_runs", "campaign_calibration"]


def promised_runs(records: list[dict]) -> dict[str, float]:
    """Run id -> the joint figure it was proposed with, over the plan records not superseded."""
    out: dict[str, float] = {}
    for rec in ledger.effective_records(records):
        body = rec.get("body", {})
        if rec.get("kind") != "plan" or rec.get("superseded_by") is not None:
            continue
        label = body.get("step_label")
        for prop in body.get("proposals", []):
            out[f"{label}-{int(prop['rank']):02d}"] = float(prop["joint"])
    return out


def campaign_calibration(log_path: str | Path, protocol: Protocol, runs: RunsTable) -> EarnedCalibration:
    """The calibration earned so far by the planned runs of the log at ``log_path``."""
    log_path = Path(log_path)
    promised = promised_runs(ledger.read_records(log_path)) if log_path.exists() else {}
    rules = limit_rules(protocol)
    measured = ~runs.pending
    for rule in rules:
        measured &= runs.measured(rule.name)
    rows = [i for i, rid in enumerate(runs.run_ids) if rid in promised and measured[i]]
    idx = np.array(rows, dtype=int)
    Y = {r.name: runs.Y[r.name][idx] for r in rules}
    broke = ~meets_limits(rules, Y, idx.size)
    return earned_calibration([promised[runs.run_ids[i]] for i in rows], broke,
                              [runs.run_ids[i] for i in rows])
