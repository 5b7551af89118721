"""The reviewer's summary of a decision log.

For every planning step in a verified log: when it was recorded, which
protocol (title, author, version, read from the protocol copy the step
kept) and which input files (names and SHA-256), the candidate counts by
exclusion rule, the near misses, and whether a later record supersedes it
and why. Corrections are listed with the record they replace.

The summary is read from the records alone; nothing is re-computed (use
``guardband replay`` for that). It refuses a log that fails verification,
because a summary of an altered log would mislead.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

from guardband.planner.errors import GuardbandError
from guardband.planner.app.campaign import read_input_copy
from guardband.planner.app.fileio import notes_text, write_csv_text
from guardband.planner.inputs.protocol import load_protocol
from guardband.planner.app.textable import render_table

from guardband.safety import ledger
from guardband.safety.canonical import to_jsonable
from guardband.safety.screen import REASONS

__all__ = ["StepSummary", "CorrectionSummary", "ReviewSummary", "summarize_log"]

#: Near misses shown per step in the table output (all of them are in csv and json).
TABLE_NEAR_MISSES = 10


@dataclass(frozen=True)
class StepSummary:
    """One planning step as a reviewer needs it."""

    index: int
    time: str
    step_label: str
    protocol: dict  # title, author, version, kind, fingerprint; "problem" when the copy is unusable
    protocol_file: dict  # name, sha256, copy
    runs_file: dict  # name, sha256, copy
    tool_version: str
    seed: int | None
    mode: str
    ranking_rule: str
    threshold: float | None
    joint_method: str
    n_candidates: int | None
    counts: dict
    n_proposals: int
    near_misses: list
    plan_table: dict
    superseded_by: int | None = None
    superseded_reason: str = ""
    operator: str = "not recorded"

    def to_dict(self) -> dict:
        return dict(self.__dict__)


@dataclass(frozen=True)
class CorrectionSummary:
    """A record that supersedes an earlier one."""

    index: int
    time: str
    kind: str
    supersedes: int
    supersedes_kind: str
    supersedes_label: str
    reason: str
    superseded_by: int | None = None
    operator: str = "not recorded"

    def to_dict(self) -> dict:
        return dict(self.__dict__)


@dataclass(frozen=True)
class ReviewSummary:
    """Everything :func:`summarize_log` found."""

    log: str
    count: int
    head: str
    steps: tuple[StepSummary, ...]
    corrections: tuple[CorrectionSummary, ...]
    other_kinds: dict = field(default_factory=dict)
    cautions: tuple[str, ...] = ()

    def to_dict(self) -> dict:
        return {
            "log": self.log,
            "verified": True,
            "count": self.count,
            "head": self.head,
            "steps": [s.to_dict() for s in self.steps],
            "corrections": [c.to_dict() for c in self.corrections],
            "other_records": dict(self.other_kinds),
            "cautions": list(self.cautions),
        }

    # ------------------------------------------------------------- renderings
    def render(self, fmt: str) -> str:
        """The summary as ``"table"``, ``"csv"`` or ``"json"`` text (ends with a newline)."""
        if fmt == "json":
            return json.dumps(to_jsonable(self.to_dict()), indent=2, ensure_ascii=False,
                              allow_nan=False) + "\n"
        if fmt == "csv":
            return self.csv_text()
        if fmt == "table":
            return self.table_text()
        raise ValueError(f"unknown format {fmt!r}; use 'table', 'csv' or 'json'")

    CSV_HEADER = (
        "index", "kind", "time", "step_label", "status", "protocol_title", "protocol_version",
        "protocol_author", "protocol_file", "protocol_sha256", "runs_file", "runs_sha256",
        "protocol_fingerprint", "tool_version", "seed", "mode", "ranking_rule", "threshold",
        "n_candidates", "survived", *REASONS, "n_proposals", "n_near_misses", "near_misses",
        "supersedes", "superseded_by", "reason", "operator",
    )

    def csv_text(self) -> str:
        """One row per planning step and per correction, in log order (notes: :meth:`csv_notes`)."""
        rows = []
        for s in self.steps:
            row = {
                "index": s.index, "kind": "plan", "time": s.time, "step_label": s.step_label,
                "status": _status(s.superseded_by),
                "protocol_title": s.protocol.get("title"), "protocol_version": s.protocol.get("version"),
                "protocol_author": s.protocol.get("author"),
                "protocol_file": s.protocol_file.get("name"), "protocol_sha256": s.protocol_file.get("sha256"),
                "runs_file": s.runs_file.get("name"), "runs_sha256": s.runs_file.get("sha256"),
                "protocol_fingerprint": s.protocol.get("fingerprint"), "tool_version": s.tool_version,
                "seed": s.seed, "mode": s.mode, "ranking_rule": s.ranking_rule, "threshold": s.threshold,
                "n_candidates": s.n_candidates, "survived": s.counts.get("survived"),
                "n_proposals": s.n_proposals, "n_near_misses": len(s.near_misses),
                "near_misses": "; ".join(_near_miss_text(d) for d in s.near_misses),
                "superseded_by": s.superseded_by, "reason": s.superseded_reason or None,
                "operator": s.operator,
            }
            row.update({r: s.counts.get(r) for r in REASONS})
            rows.append((s.index, row))
        for c in self.corrections:
            rows.append((c.index, {
                "index": c.index, "kind": c.kind, "time": c.time, "status": _status(c.superseded_by),
                "step_label": c.supersedes_label or None, "supersedes": c.supersedes,
                "superseded_by": c.superseded_by, "reason": c.reason, "operator": c.operator,
            }))
        rows.sort(key=lambda item: item[0])
        return write_csv_text([r for _, r in rows], list(self.CSV_HEADER))

    def csv_notes(self) -> str:
        """What goes with :meth:`csv_text` (a plain table): the log, its head and the cautions."""
        return notes_text([f"Guardband decision-log summary - {self.log}",
                           f"verified: {self.count} records, head {self.head}"], self.cautions)

    def table_text(self) -> str:
        """A readable summary for the terminal."""
        out = [f"Decision log {self.log}: verified, {self.count} records, head {self.head}"]
        if self.other_kinds:
            out.append("other records: " + ", ".join(f"{k} {v}" for k, v in sorted(self.other_kinds.items())))
        if not self.steps:
            out.append("no planning step is recorded in this log")
        for s in self.steps:
            out.append("")
            status = f"  [SUPERSEDED by record {s.superseded_by}: {s.superseded_reason}]" if s.superseded_by is not None else ""
            out.append(f"Step {s.step_label} (record {s.index}, {s.time}){status}")
            out.append(f"  by: {s.operator}")
            pr = s.protocol
            if "problem" in pr:
                out.append(f"  protocol: {pr['problem']}")
            else:
                out.append(f"  protocol: {pr.get('title')} (version {pr.get('version')}, by {pr.get('author')}, "
                           f"{pr.get('kind')} study)")
            out.append(f"  protocol file: {s.protocol_file.get('name')} sha256 {s.protocol_file.get('sha256')}")
            out.append(f"  runs file: {s.runs_file.get('name')} sha256 {s.runs_file.get('sha256')}")
            out.append(f"  fingerprint {pr.get('fingerprint')}; seed {s.seed}; tool version {s.tool_version}")
            out.append(f"  mode {s.mode}; ranking {s.ranking_rule}; threshold {s.threshold} ({s.joint_method}); "
                       f"{s.n_proposals} run(s) proposed; plan table {s.plan_table.get('file')}")
            counts = [(k, s.counts.get(k, 0)) for k in ("survived", *REASONS)]
            out.append(f"  candidates: {s.n_candidates}: "
                       + ", ".join(f"{k} {v}" for k, v in counts if v))
            if s.near_misses:
                groups = _grouped(s.near_misses)
                shown = groups[:TABLE_NEAR_MISSES]
                more = f"; the first {len(shown)} settings shown" if len(groups) > len(shown) else ""
                out.append(f"  near misses: {len(s.near_misses)} candidate{'s' * (len(s.near_misses) != 1)} at "
                           f"{len(groups)} distinct setting{'s' * (len(groups) != 1)}{more}:")
                header = ["candidates", "settings", "reason", "joint", "each limit", "detail"]
                rows = [[_candidates_text(g), _settings_text(g[0]), g[0].get("reason"), g[0].get("joint"),
                         _limits_text(g[0]), g[0].get("detail")] for g in shown]
                out.extend("    " + line for line in render_table(header, rows, max_width=80).splitlines())
            else:
                out.append("  near misses: none")
        out.append("")
        if self.corrections:
            out.append("Corrections:")
            for c in self.corrections:
                target = f"record {c.supersedes} ({c.supersedes_kind}{' ' + c.supersedes_label if c.supersedes_label else ''})"
                later = f" [itself superseded by record {c.superseded_by}]" if c.superseded_by is not None else ""
                out.append(f"  record {c.index} ({c.kind}, {c.time}, by {c.operator}) supersedes {target}: "
                           f"{c.reason}{later}")
        else:
            out.append("Corrections: none")
        if self.cautions:
            out.append("CAUTIONS:")
            out.extend(f"  - {c}" for c in self.cautions)
        return "\n".join(out) + "\n"


def _status(superseded_by) -> str:
    return "in force" if superseded_by is None else f"superseded by record {superseded_by}"


def _grouped(near_misses: list[dict]) -> list[list[dict]]:
    """Near misses with identical settings and reason, together, in order of first appearance."""
    groups: dict = {}
    for d in near_misses:
        key = (tuple(sorted((d.get("x") or {}).items())), d.get("reason"), d.get("detail"))
        groups.setdefault(key, []).append(d)
    return list(groups.values())


def _candidates_text(group: list[dict]) -> str:
    ids = [str(d.get("candidate")) for d in group]
    return ", ".join(ids) if len(ids) <= 3 else ", ".join(ids[:3]) + f" (+{len(ids) - 3})"


def _settings_text(d: dict) -> str:
    return ", ".join(f"{k}={float(v):.4g}" for k, v in (d.get("x") or {}).items())


def _limits_text(d: dict) -> str:
    """Every limit's probability of a near miss ("impurity 0.97, friability 0.38")."""
    return ", ".join(f"{k} {'-' if v is None else format(float(v), '.3g')}" for k, v in (d.get("p") or {}).items())


def _near_miss_text(d: dict) -> str:
    return (f"candidate {d.get('candidate')}: {d.get('reason')} ({d.get('detail')}); joint {d.get('joint')}; "
            f"{_limits_text(d)}")


def _protocol_info(base: Path, body: dict) -> dict:
    info = {"fingerprint": body.get("protocol_fingerprint")}
    pf = body.get("protocol_file") or {}
    copy = pf.get("copy")
    if not copy:
        info["problem"] = "the record names no protocol copy"
        return info
    try:
        path, _ = read_input_copy(base, pf, where="protocol_file")
        protocol = load_protocol(path)
    except GuardbandError as exc:
        info["problem"] = f"the protocol copy {copy} cannot be used: {exc}"
        return info
    st = protocol.study
    info.update({"title": st.title, "author": st.author, "version": st.version, "kind": st.kind})
    return info


def _operator_text(body: dict) -> str:
    op = body.get("operator")
    if not isinstance(op, dict) or not op.get("name"):
        return "not recorded"
    return f"{op['name']} ({op.get('source', 'source not recorded')})"


def summarize_log(path: str | Path) -> ReviewSummary:
    """Summarise a verified decision log for a reviewer.

    Parameters
    ----------
    path : str or path-like
        The decision log (``decisions.jsonl``); the protocol copies are
        looked up relative to its folder.

    Returns
    -------
    ReviewSummary

    Raises
    ------
    VerificationError
        The log is missing or fails verification.
    """
    path = Path(path)
    result = ledger.verify_or_raise(path)
    records = ledger.read_records(path)
    marked = ledger.effective_records(records)
    by_index = {r["index"]: r for r in records}
    steps, corrections, other = [], [], {}
    cautions: list[str] = []
    for rec in marked:
        body = rec.get("body") or {}
        later = rec.get("superseded_by")
        later_reason = (by_index[later].get("body") or {}).get("reason", "") if later is not None else ""
        if rec["kind"] == "plan":
            for c in body.get("cautions", []):
                if c not in cautions:
                    cautions.append(c)
            steps.append(StepSummary(
                index=rec["index"],
                time=rec["time"],
                step_label=str(body.get("step_label", "")),
                protocol=_protocol_info(path.parent, body),
                protocol_file={k: (body.get("protocol_file") or {}).get(k) for k in ("name", "sha256", "copy")},
                runs_file={k: (body.get("runs_file") or {}).get(k) for k in ("name", "sha256", "copy")},
                tool_version=str(body.get("tool_version", "")),
                seed=body.get("seed"),
                mode=str(body.get("mode", "")),
                ranking_rule=str(body.get("ranking_rule", "")),
                threshold=body.get("threshold"),
                joint_method=str(body.get("joint_method", "")),
                n_candidates=body.get("n_candidates"),
                counts=dict(body.get("counts") or {}),
                n_proposals=len(body.get("proposals") or []),
                near_misses=list(body.get("near_misses") or []),
                plan_table=dict(body.get("plan_table") or {}),
                superseded_by=later,
                superseded_reason=later_reason,
                operator=_operator_text(body),
            ))
        if "supersedes" in body:
            target = by_index.get(body["supersedes"], {})
            corrections.append(CorrectionSummary(
                index=rec["index"],
                time=rec["time"],
                kind=rec["kind"],
                supersedes=int(body["supersedes"]),
                supersedes_kind=str(target.get("kind", "")),
                supersedes_label=str((target.get("body") or {}).get("step_label", "")),
                reason=str(body.get("reason", "")),
                superseded_by=later,
                operator=_operator_text(body),
            ))
        elif rec["kind"] != "plan":
            other[rec["kind"]] = other.get(rec["kind"], 0) + 1
    return ReviewSummary(log=path.name, count=result.count, head=result.head, steps=tuple(steps),
                         corrections=tuple(corrections), other_kinds=other, cautions=tuple(cautions))
