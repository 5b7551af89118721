"""The report's tables, as rows of text for the page: proposals, near misses, models, runs, fingerprints.

Numbers are formatted here, once, for every table; probabilities get the
digits needed to show that a value is below its requirement.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

from guardband.planner import __version__
from guardband.planner.app.textable import format_cell
from guardband.planner.inputs.runs import RunsTable
from guardband.planner.models.checks import looks_overconfident
from guardband.planner.settings import COVERAGE_MIN_RUNS
from guardband.planner.step import PlanResult
from guardband.safety.limits import limit_rules, within_limit
from guardband.safety.screen import REASON_TEXT, REASONS

__all__ = ["fmt", "prob", "proposal_run_id", "proposal_rows", "near_miss_rows", "judged_sentence", "band_label",
           "count_rows", "model_rows",
           "model_warnings", "fingerprint_rows", "run_rows"]


def fmt(value, digits: int = 4) -> str:
    """A number as the report's tables show it."""
    return format_cell(value, digits=digits)


def prob(p, required: float | None = None) -> str:
    """Four decimals, or more when needed to show that p is below the requirement."""
    if p is None:
        return "-"
    p = float(p)
    if not np.isfinite(p):
        return "-"
    for digits in (4, 6, 9):
        text = f"{p:.{digits}f}"
        if required is None or float(text) < required or p >= required:
            return text
    return repr(p)


def judged_sentence(result: PlanResult) -> str:
    """What each limit's figure is the probability of, following each limit's ``judged_on``."""
    by_text: dict[str, list[str]] = {}
    for rule in limit_rules(result.protocol):
        by_text.setdefault(rule.judged_text, []).append(rule.name)
    if not by_text:
        return "There are no limits."
    if len(by_text) == 1:
        return f"Each limit's figure is the probability that {next(iter(by_text))} meets it."
    parts = [f"{text} meets it ({', '.join(names)})" for text, names in by_text.items()]
    return ("Each limit's figure is the probability, as that limit is judged, that " + " or that ".join(parts) + ".")


def band_label(result: PlanResult) -> str:
    """The slice figures' legend text for the 95% band, following the limits' ``judged_on``."""
    texts = sorted({rule.judged_on for rule in limit_rules(result.protocol)})
    if texts == ["true-value"]:
        return "95% band (limits: the true value)"
    if texts == ["measurement"] or not texts:
        return "95% band (limits: a new measurement)"
    return "95% band (limits: as each is judged)"


def near_miss_rows(result: PlanResult, shown: Sequence[str]) -> list[dict]:
    """The near misses, one row per point and reason (the candidates that share them listed together).

    ``shown`` names the factors whose values the rows carry.
    """
    p = result.protocol
    out = []
    groups: dict[tuple, dict] = {}
    for d in result.near_misses():
        key = (tuple(d["x"][n] for n in p.factor_names), d["reason"])
        reason = d["reason"]
        what, value, required, gap = "", "-", "-", "-"
        if reason == "limit-probability":
            for lim in p.limits:
                v = d["p"].get(lim.name)
                if v is not None and v < lim.probability:
                    what = lim.name
                    value, required = prob(v, lim.probability), f"≥ {lim.probability:g}"
                    gap = f"-{fmt(lim.probability - v, 3)}"
                    break
        elif reason == "joint-below-threshold":
            what = "joint figure"
            value, required = prob(d["joint"], p.screen.threshold), f"≥ {p.screen.threshold:g}"
            gap = f"-{fmt(p.screen.threshold - d['joint'], 3)}"
        elif reason == "rests-on-one-run":
            what = "one run carries the claim"
            value, required = prob(d["joint"], p.screen.threshold), f"≥ {p.screen.threshold:g}"
            gap = f"-{fmt(p.screen.threshold - d['joint'], 3)}"
        elif reason == "step-too-large" and d["step"] is not None and p.screen.max_step is not None:
            what = "step"
            value, required = fmt(d["step"]), f"≤ {p.screen.max_step:g}"
            gap = f"+{fmt(d['step'] - p.screen.max_step, 3)}"
        elif reason == "forbidden-region":
            names = [r.name for r in p.screen.forbidden if r.name in d["detail"]]
            what = "forbidden region " + (names[0] if names else "")
        else:
            what = reason
        if key in groups:
            groups[key]["candidates"].append(d["candidate"])
            continue
        row = {
            "candidates": [d["candidate"]],
            "x": [fmt(d["x"][n]) for n in shown],
            "reason": reason,
            "what": what,
            "value": value,
            "required": required,
            "gap": gap,
            "p": [prob(d["p"].get(n)) for n in p.limit_names],
            "joint": prob(d["joint"]),
            "detail": d["detail"],
            "origin": d["origin"],
        }
        groups[key] = row
        out.append(row)
    return out


def proposal_run_id(step_label: str, rank: int) -> str:
    """The run id of the proposal of this rank, as the plan table names it."""
    return f"{step_label}-{rank:02d}"


def proposal_rows(result: PlanResult, step_label: str) -> list[dict]:
    """The proposed batch, one row per proposal with every ranking value."""
    p = result.protocol
    rows = []
    for q in result.proposals:
        v = q.values
        rows.append({
            "rank": q.rank,
            "run_id": proposal_run_id(step_label, q.rank),
            "x": [fmt(float(x)) for x in q.x],
            "mean": fmt(q.mean),
            "interval": f"{fmt(q.lo95)} to {fmt(q.hi95)}",
            "p": [prob(q.p[n]) for n in p.limit_names],
            "joint": prob(q.joint),
            "ei": fmt(v.get("ei")), "pi": fmt(v.get("pi")),
            "bound": fmt(v.get("bound")), "mean_value": fmt(v.get("mean")),
            "origin": q.origin,
        })
    return rows


def count_rows(result: PlanResult) -> list[dict]:
    """How many candidates survived and how many each rule excluded, with the rule in words."""
    counts = result.counts()
    rows = [{"rule": "survived", "count": counts["survived"], "text": REASON_TEXT["survived"]}]
    rows += [{"rule": r, "count": counts[r], "text": REASON_TEXT.get(r, r)} for r in REASONS]
    return rows


def model_rows(result: PlanResult) -> tuple[list[dict], list[str]]:
    """One row per fitted model (status, leave-one-out coverage and error, widening), and the warnings."""
    rows = []
    for m in result.models:
        cov = m.loo_coverage
        rows.append({
            "response": m.response, "role": m.role, "n_runs": m.n_runs, "status": m.status,
            "coverage": "-" if cov is None else f"{100 * cov:.0f}%",
            "rmse": fmt(m.loo_rmse), "message": m.message,
            "widened": "-" if m.sd_factor is None else f"x{m.sd_factor:.3g}",
            "short": "-" if m.short_factor is None else f"x{m.short_factor:.3g}",
        })
    return rows, model_warnings(result.models)


def model_warnings(models) -> list[str]:
    """Plain-words warnings about the fitted models.

    Parameters
    ----------
    models : sequence of planner.step.ModelSummary

    Returns
    -------
    list of str
        One sentence per model that has no usable fit, that looks
        miscalibrated (leave-one-out coverage below COVERAGE_WARNING with at
        least COVERAGE_MIN_RUNS runs), or that rests on too few runs to judge.
    """
    warnings = []
    for m in models:
        cov = m.loo_coverage
        if m.status != "ok":
            warnings.append(f"The {m.role} {m.response!r} has no usable model ({m.status}: {m.message}); "
                            "it vouches for nothing, so the screen excludes every candidate it would judge.")
        elif looks_overconfident(cov, m.n_runs):
            warnings.append(f"The model of {m.response!r} looks miscalibrated: only {100 * cov:.0f}% of its "
                            f"{m.n_runs} measured values lie inside their leave-one-out 95% interval "
                            "(about 95% would be expected). Its intervals are too narrow and the "
                            "probabilities that rest on it are too optimistic; look at the data and the "
                            "model before using this plan.")
        elif cov is not None and m.n_runs < COVERAGE_MIN_RUNS:
            warnings.append(f"The model of {m.response!r} rests on {m.n_runs} runs, too few to judge "
                            "its calibration from the leave-one-out check.")
    return warnings


def fingerprint_rows(result: PlanResult, record, log_head, log_count) -> list[tuple[str, str]]:
    """What the page was made from: fingerprints and hashes of the inputs, the record and the log."""
    body = (record or {}).get("body", {})
    rows = [("protocol fingerprint", result.protocol.fingerprint)]
    pf, rf = body.get("protocol_file"), body.get("runs_file")
    if pf:
        rows.append(("protocol file", f"{pf['name']} (sha256 {pf['sha256']})"))
    rows.append(("runs file", (f"{rf['name']} " if rf else "") + f"(sha256 {result.runs_sha256})"))
    recorded_version = body.get("tool_version")
    if recorded_version and recorded_version != __version__:
        rows.append(("tool version", f"{recorded_version} (recorded); this page made with {__version__}"))
    else:
        rows.append(("tool version", __version__))
    rows.append(("seed", str(result.seed) + (" (drawn at random and recorded)" if body.get("seed_drawn") else "")))
    if record:
        rows.append(("decision record", f"index {record['index']}, {record['time']}, hash {record['hash']}"))
        op = body.get("operator")
        rows.append(("recorded by", f"{op.get('name')} (from {op.get('source')})" if isinstance(op, dict)
                     else "not recorded (the record predates operator names)"))
        for key, label in (("plan_table", "plan table"), ("plan_notes", "its notes and cautions")):
            if body.get(key):
                rows.append((label, f"{body[key]['file']} (sha256 {body[key]['sha256']})"))
    if log_head is not None:
        rows.append(("decision log", f"head {log_head}, {log_count} record{'s' * (log_count != 1)} "
                                     "(check with guardband verify --expect-head ... --expect-count ...)"))
    return rows


def _run_status(protocol, runs: RunsTable, i: int) -> str:
    if runs.pending[i]:
        return "pending (not measured)"
    missed, unmeasured = [], []
    for lim in limit_rules(protocol):
        v = runs.Y[lim.name][i]
        if not np.isfinite(v):
            unmeasured.append(lim.name)
        elif not within_limit(v, lim):
            missed.append(lim.name)
    parts = []
    if missed:
        parts.append("missed " + ", ".join(missed))
    if unmeasured:
        parts.append("not measured: " + ", ".join(unmeasured))
    return "; ".join(parts) or "met every limit"


def run_rows(protocol, runs: RunsTable) -> dict:
    """Every run in file order: its factors, its responses and whether it met every limit."""
    names = list(protocol.response_names)
    rows = []
    for i, rid in enumerate(runs.run_ids):
        rows.append({
            "run_id": rid,
            "x": [fmt(float(v)) for v in runs.X[i]],
            "y": [fmt(float(runs.Y[n][i])) if np.isfinite(runs.Y[n][i]) else "-" for n in names],
            "status": _run_status(protocol, runs, i),
        })
    return {"responses": names, "rows": rows}
