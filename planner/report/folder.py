"""Reports of recorded planning steps: every plan record of a campaign folder, or the step just made.

Folder layout written next to the decision log::

    report-<step_label>.html
    figures-<step_label>/<name>.png

Each recorded step is re-run from its recorded inputs to rebuild its models,
and the re-run is compared with the record by the workflow's own comparison.
Recipes judged (``guardband judge``) on a step's protocol and runs file, in
records not superseded, are drawn on that step's slices and map.
"""

from __future__ import annotations

from pathlib import Path
from typing import Sequence

from guardband.planner import __version__
from guardband.planner.errors import VerificationError
from guardband.planner.inputs.runs import RunsTable, read_runs_bytes
from guardband.safety import ledger

import numpy as np

from guardband.planner.report.data import JudgedRecipe, check_factor_names
from guardband.planner.report.page import ReportFiles, build_report, write_report

__all__ = ["report_folder", "report_plan", "judged_recipes"]


def _supersession(records: list[dict]) -> dict[int, str]:
    """Record index -> a sentence naming the later record that supersedes it."""
    out = {}
    by_index = {r["index"]: r for r in records}
    for rec in ledger.effective_records(records):
        later = rec.get("superseded_by")
        if later is not None:
            later_body = by_index[later]["body"]
            reason = later_body.get("reason", "")
            op = later_body.get("operator")
            who = f", by {op.get('name')} ({op.get('source')})" if isinstance(op, dict) else ""
            out[rec["index"]] = (f"This planning step was superseded by record {later} "
                                 f"({by_index[later]['kind']}{who}): {reason}")
    return out


def judged_recipes(records: list[dict], plan: dict, factor_names) -> tuple[JudgedRecipe, ...]:
    """The recipes of the ``judge`` records (not superseded) made on a plan record's protocol and runs file,
    their amounts in the order of ``factor_names`` (the log's JSON keeps keys in sorted order)."""
    body = plan["body"]
    out = []
    for rec in ledger.effective_records(records):
        b = rec.get("body", {})
        if (rec.get("kind") != "judge" or rec.get("superseded_by") is not None
                or b.get("protocol_fingerprint") != body.get("protocol_fingerprint")
                or b.get("runs_sha256") != body.get("runs_sha256")):
            continue
        for v in b.get("verdicts", []):
            out.append(JudgedRecipe(str(v["recipe"]), np.array([v["x"][n] for n in factor_names], dtype=float),
                                    bool(v["passes"]), rec["index"]))
    return tuple(out)


def _recorded_runs(folder: Path, body: dict, protocol) -> RunsTable:
    """The runs of a plan record, read from its input copy as the plan read them."""
    from guardband.planner.app.campaign import read_input_copy

    options = body["runs_file"].get("read_options") or {}
    path, data = read_input_copy(folder, body["runs_file"], where="record runs_file")
    return read_runs_bytes(data, protocol, source=path.name, suffix=path.suffix, **options)


def report_folder(folder: str | Path, *, map_factors: Sequence[str] | None = None) -> list[ReportFiles]:
    """Write a report for every planning step recorded in ``folder/decisions.jsonl``.

    Each step is re-run from its recorded inputs
    (:func:`planner.workflow.rerun_record`) to rebuild its models; the
    re-run's plan table must hash to the recorded one. When it does not,
    the report says so at the top and ``problems`` names it.

    Raises
    ------
    VerificationError
        The log is missing, fails verification, holds no plan record, or an
        input copy is missing or altered.
    """
    from guardband.planner.app.audit import verify_campaign
    from guardband.planner.app.campaign import read_input_copy
    from guardband.planner.app.workflow import LOG_NAME, compare_with_record, rerun_record

    folder = Path(folder)
    log = folder / LOG_NAME
    if not log.is_file():
        raise VerificationError(f"{folder}: there is no decision log {LOG_NAME} here; "
                                "run `guardband plan ... --out` into this folder first")
    verdict = verify_campaign(log, accept_empty=True)
    if not verdict.ok:
        raise VerificationError(f"decision log {log} failed verification: {verdict.problem}")
    records = ledger.read_records(log)
    plans = [r for r in records if r["kind"] == "plan"]
    # a step planned again on the same inputs has the same label and files: its last record only
    last = {r["body"].get("step_label", r["index"]): r for r in plans}
    plans = [r for r in plans if last[r["body"].get("step_label", r["index"])] is r]
    if not plans:
        raise VerificationError(f"{log}: the log holds no plan record, so there is nothing to report")
    if map_factors is not None:  # refuse a bad --map before the (slow) re-runs
        from guardband.planner.inputs.protocol import load_protocol

        for rec in plans:
            try:
                copy, _ = read_input_copy(folder, rec["body"].get("protocol_file"),
                                          where=f"record {rec['index']} protocol_file")
            except VerificationError:
                continue  # rerun_record names the missing or altered copy
            check_factor_names(map_factors, load_protocol(copy).factor_names)
    head, count = ledger.head_and_count(log)
    superseded = _supersession(records)
    out = []
    for rec in plans:
        result, rec = rerun_record(log, rec["index"])
        body = rec["body"]
        problems = []
        replay = compare_with_record(result, rec)
        sha = replay.replayed_sha256
        step_label = body.get("step_label", replay.step_label)
        if sha != replay.recorded_sha256:
            problems.append(
                f"Re-running record {rec['index']} from its recorded inputs gave a different plan table "
                f"(sha256 {sha[:12]}... instead of the recorded {body['plan_table']['sha256'][:12]}...). "
                "This page shows the re-run, not the recorded plan; compare with "
                f"{body['plan_table']['file']} and the decision log before using it.")
        if body.get("tool_version") != __version__:
            problems.append(f"Recorded with tool version {body.get('tool_version')}; this page was made "
                            f"with {__version__}.")
        if rec["index"] in superseded:
            problems.append(superseded[rec["index"]])
        runs = _recorded_runs(folder, body, result.protocol)
        report = build_report(result, runs, step_label=step_label, record=rec, log_head=head,
                              log_count=count, map_factors=map_factors, problems=problems,
                              judged=judged_recipes(records, rec, result.protocol.factor_names))
        out.append(write_report(report, folder, record_index=rec["index"]))
    return out


def report_plan(outcome, *, map_factors: Sequence[str] | None = None) -> ReportFiles:
    """Write the report of a planning step just made by :func:`planner.workflow.run_plan`.

    Parameters
    ----------
    outcome : planner.workflow.PlanOutcome
    map_factors : two factor names, optional
    """
    body = outcome.record["body"]
    folder = outcome.log_path.parent
    runs = _recorded_runs(folder, body, outcome.result.protocol)
    judged = judged_recipes(ledger.read_records(outcome.log_path), outcome.record,
                            outcome.result.protocol.factor_names)
    report = build_report(outcome.result, runs, step_label=body["step_label"], record=outcome.record,
                          log_head=outcome.head, log_count=outcome.count, map_factors=map_factors, judged=judged)
    return write_report(report, folder, record_index=outcome.record["index"])
