"""What each command does, as plain functions the CLI (or a notebook) calls.

The CLI parses options, calls one function here, and prints what it
returns. These functions read and write files; the numerical work lives in
:mod:`planner.step`, :mod:`planner.space` and :mod:`safety.screen`.

Output folder layout of ``plan`` (one folder per campaign)::

    decisions.jsonl            the decision log (hash chain)
    plan-<hash12>.csv          the proposed runs of one planning step
    plan-<hash12>.notes.txt    its notes (fingerprints, seed, mode, why each
                               pick) and cautions
    exclusions-<hash12>.csv    every candidate of that step and its fate
    exclusions-<hash12>.notes.txt
    inputs/protocol-<hash12>.toml, inputs/runs-<hash12>.csv
                               exact copies of the inputs, for replay

The tables are plain CSV (``pandas.read_csv`` reads them with its default
settings) whose last column, ``cautions``, holds the cautions in every row;
the notes that used to be ``#`` lines above the header are in the
companion ``.notes.txt`` file (see :mod:`planner.app.fileio` for why).
An input copy's name carries the first 12 hex digits of its own SHA-256; a
table and its notes file carry those of the table's bytes followed by the
notes' bytes, so two planning steps never overwrite each other's files
(not even two whose tables agree but whose notes differ) and identical
inputs write identical files.
"""

from __future__ import annotations

import dataclasses
import hashlib
import secrets
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, NamedTuple

import numpy as np

from guardband.planner import __version__, settings
from guardband.planner.errors import OutputError, ProtocolError, RunsDataError, VerificationError
from guardband.planner.app.campaign import commit_step, read_input_copy
from guardband.planner.app.fileio import notes_path, table_with_notes
from guardband.planner.inputs.protocol import Protocol, load_protocol
from guardband.planner.inputs.reading import read_input
from guardband.planner.inputs.runs import RUN_ID, RunsTable, read_runs_bytes
from guardband.planner.app.history import campaign_calibration
from guardband.planner.step.attitudes import rule_guidance, threshold_binding
from guardband.safety.calibration import EarnedCalibration

from guardband.safety import cautions as _cautions
from guardband.safety import ledger
from guardband.safety.canonical import canonical_json

if TYPE_CHECKING:
    from guardband.planner.step import PlanResult

__all__ = [
    "LOG_NAME",
    "CheckReport",
    "check_protocol",
    "start_design",
    "PlanOutcome",
    "run_plan",
    "warm_start_for",
    "plan_table",
    "exclusion_table",
    "StepTables",
    "render_tables",
    "table_file_names",
    "ReplayOutcome",
    "rerun_record",
    "replay_record",
    "cautions_of",
]

LOG_NAME = "decisions.jsonl"
_FLOAT = ".6g"


def cautions_of(protocol: Protocol) -> tuple[str, ...]:
    """The cautions every output of this protocol carries."""
    return _cautions.cautions_for(protocol.study.kind)


def _short(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()[:12]


def plan_step(*args, **kwargs) -> PlanResult:
    """:func:`guardband.planner.step.plan_step`, imported when a step runs (the models
    import scipy's optimisers, which ``check`` does not need)."""
    from guardband.planner.step import plan_step as step

    return step(*args, **kwargs)


# ------------------------------------------------------------------ check
@dataclass(frozen=True)
class CheckReport:
    """Result of ``guardband check``."""

    protocol: Protocol
    empty: bool
    conflicts: tuple[str, ...]
    ranges: np.ndarray  # (n_factors, 2)
    centre: np.ndarray | None
    radius: float | None
    message: str

    def rows(self) -> list[dict]:
        out = []
        for k, f in enumerate(self.protocol.factors):
            out.append(
                {
                    "factor": f.name,
                    "kind": f.kind,
                    "unit": f.unit,
                    "declared_low": f.low,
                    "declared_high": f.high,
                    "reach_low": float(self.ranges[k, 0]) if not self.empty else None,
                    "reach_high": float(self.ranges[k, 1]) if not self.empty else None,
                    "centre": float(self.centre[k]) if self.centre is not None else None,
                }
            )
        return out

    def to_dict(self) -> dict:
        p = self.protocol
        return {
            "protocol": {"title": p.study.title, "version": p.study.version, "author": p.study.author,
                         "kind": p.study.kind, "fingerprint": p.fingerprint},
            "empty": self.empty,
            "conflicts": list(self.conflicts),
            "factors": self.rows(),
            "centre_radius": self.radius,
            "limits": [lim.describe() for lim in p.limits],
            "message": self.message,
            "guidance": self.guidance(),
            "notes": self.notes(),
            "threshold_warnings": self.threshold_warnings(),
            "tool_version": __version__,
            "cautions": list(cautions_of(p)),
        }

    def notes(self) -> list[str]:
        """What the protocol leaves unchecked: without limits, the safety screen checks nothing."""
        if self.protocol.limits:
            return []
        return ["limits: none; the safety screen checks nothing (every candidate passes it), and only "
                "the factors' bounds and the constraints keep runs in the design space"]

    def guidance(self) -> list[str]:
        """The ranking rule's attitude to risk in plain words (and what suits a dose study)."""
        return rule_guidance(self.protocol)

    def threshold_warnings(self) -> list[str]:
        """A screen threshold that cannot bind, or per-limit requirements it makes redundant."""
        return threshold_binding(self.protocol)


def check_protocol(path: str | Path) -> CheckReport:
    """Validate a protocol and describe its design space.

    Raises
    ------
    ProtocolError
        For an invalid protocol. An empty design space is *returned* (with
        ``empty=True`` and the conflicting constraints) so that the caller
        can show it; the CLI then exits with the protocol error code.
    """
    protocol = load_protocol(path)
    space = protocol.design_space()
    result = space.check()
    point = result.single_point(space.names)
    if point:
        raise ProtocolError(f"{Path(path).name}: {point}")
    start = protocol.start_rows()
    message = result.message
    if not result.empty and start is not None:
        region = space.add_inequalities(*start).check()
        if region.empty:
            return CheckReport(
                protocol, True, ("the starting region does not meet the design space", *region.conflicts),
                np.asarray(result.ranges), None, None,
                message + "; the starting region does not meet the design space",
            )
    return CheckReport(
        protocol=protocol,
        empty=bool(result.empty),
        conflicts=tuple(result.conflicts),
        ranges=np.asarray(result.ranges),
        centre=None if result.empty else np.asarray(result.centre),
        radius=None if result.empty else float(result.radius),
        message=message,
    )


# ------------------------------------------------------------------ start
def start_design(protocol: Protocol, n: int, *, seed: int) -> tuple[list[str], list[list], list[str]]:
    """A starting design of ``n`` runs in protocol units, ready to fill in.

    Returns
    -------
    header, rows, notes
        ``header`` is run_id, the factors, the (empty) responses and notes.
    """
    from guardband.planner.space import starting_design

    if n < 1:
        raise ProtocolError("--runs must be at least 1")
    space = protocol.design_space()
    check = space.check()
    if check.empty:
        raise ProtocolError("the design space is empty; conflicting constraints: " + "; ".join(check.conflicts))
    region = protocol.start_rows()
    mixture = [k for k, f in enumerate(protocol.factors) if f.kind == "component"] or None
    X, labels = starting_design(
        space, n, rng=np.random.default_rng(seed), mixture_indices=mixture,
        region=region,  # with its labels, so that a refusal names the rule
    )
    header = [RUN_ID, *protocol.factor_names, *protocol.runs_columns, "notes"]
    width = max(2, len(str(n)))
    run_ids = [f"S{i:0{width}d}" for i in range(1, len(X) + 1)]
    inner = space if region is None else space.add_inequalities(*region)
    X, notes = _start_on_grid(protocol, inner, X, run_ids, in_region=region is not None)
    rows = [[rid, *[float(v) for v in x], *[""] * len(protocol.runs_columns), label]
            for rid, x, label in zip(run_ids, X, labels)]
    if region is not None:
        notes.append("every starting run lies inside the protocol's starting region")
    return header, rows, notes + _repeats_note(X, run_ids)


def _repeats_note(X: np.ndarray, run_ids: list[str]) -> list[str]:
    """A note naming the starting runs whose settings repeat an earlier one's (a space or
    starting region with fewer settings than runs asked for: discrete levels, a coarse grid)."""
    first: dict[tuple, str] = {}
    repeats = []
    for rid, x in zip(run_ids, X):
        key = tuple(float(v) for v in x)
        if key in first:
            repeats.append(f"{rid} (= {first[key]})")
        else:
            first[key] = rid
    if not repeats:
        return []
    return [f"{len(repeats)} starting run(s) repeat the settings of an earlier one, as replicates: "
            f"{', '.join(repeats)}; only {len(first)} distinct settings were found for {len(run_ids)} runs "
            "(ask for fewer runs for distinct settings only)"]


def _start_on_grid(protocol: Protocol, inner, X: np.ndarray, run_ids: list[str], *,
                   in_region: bool) -> tuple[np.ndarray, list[str]]:
    """The starting runs rounded to their factors' resolution, as a plan rounds its candidates.

    Each run takes the first of its grid neighbours (its own rounding first)
    that lies inside ``inner`` (the design space and the starting region);
    a run with none is left as it is, and the notes name it.
    """
    from guardband.planner.space.rounding import rounding_of  # here: the space package loads cvxpy

    rnd = rounding_of(protocol)
    if not rnd.any:
        return X, []
    out, unrounded = X.copy(), []
    for i, x in enumerate(X):
        grid = rnd.neighbours(x)
        inside = np.flatnonzero(inner.contains(grid))
        if inside.size:
            out[i] = grid[inside[0]]
        else:
            unrounded.append(run_ids[i])
    notes = [f"every starting run is rounded to its factors' resolution ({rnd.describe()})"]
    if unrounded:
        notes = [f"the starting runs are rounded to their factors' resolution ({rnd.describe()}), except "
                 f"{', '.join(unrounded)}: no grid point next to them lies inside the design space"
                 + (" and the starting region" if in_region else "") + "; they are given unrounded"]
    return out, notes


# ------------------------------------------------------------------- plan
def plan_table(result: PlanResult, *, step_label: str) -> tuple[list[str], list[list]]:
    """The plan table: proposed runs and what the models say about each."""
    from guardband.planner.step.rates import limit_rate_bands  # here: `check` never loads the step

    p = result.protocol
    obj = p.objective.name
    bands = limit_rate_bands(result)  # a binomial limit's predicted true rate: median and 95% interval
    header = [
        "rank", RUN_ID, *p.factor_names,
        f"{obj}_mean", f"{obj}_lo95", f"{obj}_hi95",
        *[f"p_{n}" for n in p.limit_names],
        *[f"{n}_{part}" for n in bands for part in ("median", "lo95", "hi95")],
        "joint", "ei", "pi", "bound", "mean", "origin",
    ]
    rows = []
    for k, prop in enumerate(result.proposals):
        v = prop.values
        rows.append([
            prop.rank, f"{step_label}-{prop.rank:02d}", *[float(x) for x in prop.x],
            prop.mean, prop.lo95, prop.hi95,
            *[prop.p[n] for n in p.limit_names],
            *[None if b is None else float(a[k]) for b in bands.values() for a in (b or (None,) * 3)],
            prop.joint, v.get("ei"), v.get("pi"), v.get("bound"), v.get("mean"), prop.origin,
        ])
    return header, rows


def exclusion_table(result: PlanResult) -> tuple[list[str], list[list]]:
    """Every candidate of the step: survived or excluded, and why."""
    p = result.protocol
    s = result.screen
    header = ["candidate", "origin", "status", "reason", "detail", *p.factor_names,
              *[f"p_{n}" for n in p.limit_names], "joint", "step", "score"]
    rows = []
    for i in range(s.n):
        rows.append([
            i, str(result.origin[i]), "survived" if s.survives[i] else "excluded",
            str(s.reason[i]), s.detail[i], *[float(x) for x in result.pool[i]],
            *[_cell(s.P[i, j]) for j in range(len(p.limit_names))],
            float(s.joint[i]), _cell(s.step[i]), _cell(result.scores[i]),
        ])
    return header, rows


def _cell(v):
    v = float(v)
    return v if np.isfinite(v) else None


def _header_lines(result: PlanResult, what: str, extra: list[str] = ()) -> list[str]:
    p = result.protocol
    return [
        f"Guardband {what} - {p.study.title}",
        f"protocol fingerprint {p.fingerprint}; runs file sha256 {result.runs_sha256}; "
        f"seed {result.seed}; tool version {result.version}",
        *extra,
    ]


@dataclass(frozen=True)
class PlanOutcome:
    """What ``guardband plan`` did."""

    result: PlanResult
    seed: int
    seed_drawn: bool
    record: dict
    log_path: Path
    files: dict[str, Path] = field(default_factory=dict)
    head: str = ""
    count: int = 0
    calibration: EarnedCalibration | None = None
    warnings: tuple[str, ...] = ()  # about the campaign folder (another study's steps in its log)


def log_records(log_path: Path) -> list[dict]:
    """The records of the decision log at ``log_path`` (none when there is no log yet), read once
    per step for the warm start, the earned calibration and the other-study check."""
    return ledger.read_records(log_path) if log_path.exists() else []


def warm_start_for(records: list[dict], fingerprint: str, runs_sha256: str, seed: int) -> tuple[dict, int | None]:
    """The warm start of a step on these inputs, and the record it comes from (None: none), from the
    log's ``records``.

    A warm start changes where the hyperparameter search begins, and so can
    move the answer in its last digits. So a step on the same protocol, runs
    and seed as an earlier plan in the log takes that plan's own warm start
    (and names the same source), and gives the same plan; any other step
    starts from the hyperparameters of the last plan on this protocol.
    """
    plans = [rec for rec in records
             if rec.get("kind") == "plan" and rec.get("body", {}).get("protocol_fingerprint") == fingerprint]
    for rec in reversed(plans):
        body = rec["body"]
        if body.get("runs_sha256") == runs_sha256 and body.get("seed") == seed:
            return dict(body.get("warm_start") or {}), body.get("warm_start_from")
    if not plans:
        return {}, None
    last = plans[-1]
    return ({m["response"]: m["hyperparameters"] for m in last["body"].get("models", [])
             if m.get("hyperparameters")}, int(last["index"]))


def other_study_warning(records: list[dict], protocol: Protocol) -> list[str]:
    """A warning when the last plan of the log's ``records`` modelled other responses than ``protocol``:
    another study's campaign folder, most likely (an amendment that keeps the responses is the
    campaign's own)."""
    plans = [rec for rec in records if rec.get("kind") == "plan"]
    if not plans:
        return []
    last = plans[-1]
    before = [m.get("response") for m in last["body"].get("models", [])]
    if not before or set(before) == set(protocol.response_names):  # no models recorded: nothing to compare
        return []
    return [f"the campaign folder's last plan (record {last['index']}, protocol file "
            f"{last['body'].get('protocol_file', {}).get('name', '?')}) is of another study: it modelled "
            f"{', '.join(before)}; this protocol models {', '.join(protocol.response_names)}. The step is "
            "recorded in the same decision log; give a new --out folder to keep the studies apart"]


def run_plan(
    protocol_path: str | Path,
    runs_path: str | Path,
    out_dir: str | Path,
    *,
    count: int | None = None,
    seed: int | None = None,
    pool_size: int | None = None,
    delimiter: str | None = None,
    decimal: str | None = None,
    sheet: str | None = None,
    by: str | None = None,
    max_runs: int = settings.MAX_RUNS_DEFAULT,
) -> PlanOutcome:
    """Plan the next batch and record it.

    Reads and checks both inputs before anything is computed, runs one
    planning step, writes the plan table, the exclusion table and copies of
    the inputs (each atomically), then appends the decision-log record that
    names them by hash. A failure before the append leaves the log as it was.
    ``delimiter``, ``decimal`` and ``sheet`` are passed to
    :func:`planner.runs.read_runs` and recorded, so that a replay reads the
    runs copy the same way. ``by`` names the operator (see
    :func:`planner.app.audit.resolve_operator`); the record says where the
    name came from.
    """
    from guardband.planner.app.audit import resolve_operator
    from guardband.planner.models import blas_limit  # the models: only where a step runs

    operator = resolve_operator(by)
    protocol_path, runs_path, out_dir = Path(protocol_path), Path(runs_path), Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise OutputError(f"{out_dir} exists and is not a folder; --out names a campaign folder")
    # The bytes that are hashed, copied and recorded are the bytes that were
    # checked: the runs are parsed from them, and the protocol must not
    # change while it is read.
    protocol_bytes = _read_input(protocol_path, ProtocolError, "protocol")
    protocol = load_protocol(protocol_path)
    if _read_input(protocol_path, ProtocolError, "protocol") != protocol_bytes:
        raise ProtocolError(f"{protocol_path}: the protocol file changed while it was being read; try again")
    runs_bytes = _read_input(runs_path, RunsDataError, "runs")
    read_options = {"delimiter": delimiter, "decimal": decimal, "sheet": sheet}
    runs = read_runs_bytes(runs_bytes, protocol, source=runs_path.name, suffix=runs_path.suffix,
                           max_runs=max_runs, **read_options)
    seed_drawn = False
    if seed is None:
        seed = protocol.seed
    if seed is None:
        seed = secrets.randbelow(2**63)
        seed_drawn = True
    log_path = out_dir / LOG_NAME
    if log_path.exists():
        ledger.verify_or_raise(log_path)
    records = log_records(log_path)
    warm, warm_from = warm_start_for(records, protocol.fingerprint, runs.sha256, seed)
    calibration = campaign_calibration(records, protocol, runs)
    warnings = tuple(other_study_warning(records, protocol))
    with blas_limit(), ProtocolError.naming(protocol_path):
        result = plan_step(protocol, runs, seed=seed, count=count, warm_start=warm, pool_size=pool_size)
    outcome = _write_plan(result, protocol, protocol_bytes, runs_bytes, out_dir, log_path,
                          seed, seed_drawn, count, pool_size, protocol_path, runs_path,
                          read_options=read_options, calibration=calibration, operator=operator,
                          warm_from=warm_from)
    return dataclasses.replace(outcome, warnings=warnings)


def _read_input(path: Path, error, what: str) -> bytes:
    limit = settings.MAX_PROTOCOL_BYTES if error is ProtocolError else settings.MAX_RUNS_FILE_BYTES
    return read_input(path, what=what, error=error, max_bytes=limit)


#: Suffixes a runs copy keeps (a workbook stays a workbook); others become .csv.
_RUNS_SUFFIXES = (".csv", ".tsv", ".txt", ".xlsx", ".xlsm")


class StepTables(NamedTuple):
    """The files of one planning step's tables, as bytes, and its step label."""

    plan: bytes
    plan_notes: bytes
    exclusions: bytes
    exclusion_notes: bytes
    step_label: str


def render_tables(result: PlanResult, count_asked: int | None) -> StepTables:
    """The plan table, the exclusion table and their notes files of a step, and its step label."""
    body_id = _short(canonical_json({"p": result.proposal_dicts(), "s": result.seed,
                                     "f": result.protocol.fingerprint, "r": result.runs_sha256}))
    step_label = f"P{body_id[:6]}"
    header, rows = plan_table(result, step_label=step_label)
    extra = [f"mode: {result.mode}; ranking rule: "
             f"{result.protocol.ranking.rule if result.mode == 'improve' else 'joint figure'}; "
             f"threshold {result.protocol.screen.threshold:g} ({result.protocol.screen.joint})"]
    extra += [f"note: {m}" for m in result.messages]
    extra.append("rank is the order of the greedy batch choice: after each pick its fantasised "
                 "results are added to the models, so a later rank may show a larger single-run value")
    extra += [f"why rank {prop.rank}: {prop.reason}" for prop in result.proposals if prop.reason]
    cautions = cautions_of(result.protocol)
    plan, plan_notes = table_with_notes(header, rows, _header_lines(result, "plan", extra), cautions,
                                        float_format=_FLOAT)
    eh, er = exclusion_table(result)
    excl, excl_notes = table_with_notes(eh, er, _header_lines(result, "exclusion table"), cautions,
                                        float_format=_FLOAT)
    return StepTables(plan, plan_notes, excl, excl_notes, step_label)


def table_file_names(prefix: str, table: bytes, notes: bytes) -> tuple[str, str]:
    """``<prefix>-<hash12>.csv`` and its notes file; the hash is of the table's bytes, then the notes'."""
    name = f"{prefix}-{_short(table + notes)}.csv"
    return name, notes_path(name)


def _write_plan(result, protocol, protocol_bytes, runs_bytes, out_dir, log_path, seed, seed_drawn,
                count, pool_size, protocol_path, runs_path, *, read_options=None,
                calibration: EarnedCalibration | None = None, operator: dict | None = None,
                warm_from: int | None = None) -> PlanOutcome:
    tables = render_tables(result, count)
    created = not out_dir.exists()
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
        (out_dir / "inputs").mkdir(exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create the campaign folder {out_dir}: {exc.strerror or exc}") from None
    try:
        return _record_plan(result, protocol, protocol_bytes, runs_bytes, out_dir, log_path, seed,
                            seed_drawn, count, pool_size, protocol_path, runs_path, tables,
                            read_options=read_options,
                            calibration=calibration, operator=operator, warm_from=warm_from)
    except BaseException:
        if created:
            _remove_new_campaign(out_dir, log_path)
        raise


def _remove_new_campaign(out_dir: Path, log_path: Path) -> None:
    """Remove a campaign folder this step created, if the step left only its empty shell."""
    if log_path.exists():
        return
    try:
        Path(str(log_path) + ".lock").unlink(missing_ok=True)
        (out_dir / "inputs").rmdir()
        out_dir.rmdir()
    except OSError:
        pass  # something else is in it now: leave it


def _record_plan(result, protocol, protocol_bytes, runs_bytes, out_dir, log_path, seed, seed_drawn,
                 count, pool_size, protocol_path, runs_path, tables: StepTables, *,
                 read_options, calibration, operator, warm_from=None) -> PlanOutcome:
    runs_suffix = runs_path.suffix.lower() if runs_path.suffix.lower() in _RUNS_SUFFIXES else ".csv"
    plan_name, plan_notes_name = table_file_names("plan", tables.plan, tables.plan_notes)
    excl_name, excl_notes_name = table_file_names("exclusions", tables.exclusions, tables.exclusion_notes)
    files = {
        "plan": out_dir / plan_name,
        "plan_notes": out_dir / plan_notes_name,
        "exclusions": out_dir / excl_name,
        "exclusion_notes": out_dir / excl_notes_name,
        "protocol_copy": out_dir / "inputs" / f"protocol-{_short(protocol_bytes)}.toml",
        "runs_copy": out_dir / "inputs" / f"runs-{_short(runs_bytes)}{runs_suffix}",
    }
    contents = {files["protocol_copy"]: protocol_bytes, files["runs_copy"]: runs_bytes,
                files["exclusions"]: tables.exclusions, files["exclusion_notes"]: tables.exclusion_notes,
                files["plan"]: tables.plan, files["plan_notes"]: tables.plan_notes}
    body = result.record_body()
    body.update({
        "step_label": tables.step_label,
        "count_requested": count,
        "pool_size_requested": pool_size,
        "seed_drawn": seed_drawn,
        # the record whose models' hyperparameters the search started from (None: none)
        "warm_start_from": warm_from,
        "protocol_file": {"name": protocol_path.name, "sha256": hashlib.sha256(protocol_bytes).hexdigest(),
                          "copy": files["protocol_copy"].relative_to(out_dir).as_posix()},
        "runs_file": {"name": runs_path.name, "sha256": result.runs_sha256,
                      "copy": files["runs_copy"].relative_to(out_dir).as_posix(),
                      "read_options": dict(read_options or {})},
        "plan_table": _file_entry(files["plan"], tables.plan),
        "plan_notes": _file_entry(files["plan_notes"], tables.plan_notes),
        "exclusion_table": _file_entry(files["exclusions"], tables.exclusions),
        "exclusion_notes": _file_entry(files["exclusion_notes"], tables.exclusion_notes),
        "cautions": list(cautions_of(protocol)),
    })
    if calibration is not None:
        body["calibration_earned"] = calibration.to_dict()
    if operator is not None:
        body["operator"] = operator
    record = commit_step(out_dir, log_path, contents, "plan", body)
    head, n = ledger.head_and_count(log_path)
    return PlanOutcome(result=result, seed=int(seed), seed_drawn=seed_drawn, record=record,
                       log_path=log_path, files=files, head=head, count=n, calibration=calibration)


def _file_entry(path: Path, data: bytes) -> dict:
    """A record's entry for a file the step writes: its name and SHA-256."""
    return {"file": path.name, "sha256": hashlib.sha256(data).hexdigest()}


# ----------------------------------------------------------------- replay
@dataclass(frozen=True)
class ReplayOutcome:
    """Whether re-running a recorded planning step gave the same plan."""

    index: int
    identical: bool
    differences: tuple[str, ...]
    recorded_sha256: str
    replayed_sha256: str
    step_label: str = ""

    def to_dict(self) -> dict:
        return dict(self.__dict__)


def rerun_record(log_path: str | Path, index: int, *, explain: bool = True) -> tuple[PlanResult, dict]:
    """Re-run the planning step of plan record ``index`` from its recorded inputs.

    The inputs are the copies the plan kept under ``inputs/``; their hashes
    must match the record. The step runs with the recorded seed, warm start,
    batch size and pool size; ``explain=False`` leaves out the rule
    comparison and the price of the threshold (:func:`plan_step`), which
    change neither table.

    Returns
    -------
    (PlanResult, record)

    Raises
    ------
    VerificationError
        The log or a file its records name fails verification
        (:func:`planner.app.audit.verify_campaign`), the record is not a
        plan, or an input copy is missing, altered, outside ``inputs/`` or
        not a regular file.
    """
    from guardband.planner.app.audit import verify_campaign
    from guardband.planner.models import blas_limit

    log_path = Path(log_path)
    verdict = verify_campaign(log_path, accept_empty=True)
    if not verdict.ok:
        raise VerificationError(f"decision log {log_path} failed verification: {verdict.problem}")
    records = ledger.read_records(log_path)
    if not 0 <= index < len(records):
        raise VerificationError(f"{log_path.name}: there is no record {index} (the log has {len(records)})")
    rec = records[index]
    if rec["kind"] != "plan":
        raise VerificationError(f"{log_path.name}: record {index} is a {rec['kind']!r} record, not a plan")
    body = rec["body"]
    base = log_path.parent
    protocol_copy, _ = read_input_copy(base, body.get("protocol_file"), where=f"record {index} protocol_file")
    runs_copy, runs_bytes = read_input_copy(base, body.get("runs_file"), where=f"record {index} runs_file")
    protocol = load_protocol(protocol_copy)
    runs: RunsTable = read_runs_bytes(runs_bytes, protocol, source=runs_copy.name, suffix=runs_copy.suffix,
                                      **(body["runs_file"].get("read_options") or {}))
    with blas_limit():
        result = plan_step(protocol, runs, seed=body["seed"], count=body.get("count_requested"),
                           warm_start=body.get("warm_start") or {}, pool_size=body.get("pool_size_requested"),
                           explain=explain)
    return result, rec


def replay_record(log_path: str | Path, index: int) -> ReplayOutcome:
    """Re-run a recorded planning step and compare its tables byte for byte.

    Raises
    ------
    VerificationError
        As :func:`rerun_record`.
    """
    return compare_with_record(*rerun_record(log_path, index, explain=False))  # the tables only


def compare_with_record(result: PlanResult, rec: dict) -> ReplayOutcome:
    """Compare a re-run step's tables (and fingerprint, tool version) with its plan record."""
    body = rec["body"]
    differences = []
    if result.protocol.fingerprint != body["protocol_fingerprint"]:
        differences.append("the protocol fingerprint differs")
    if body.get("tool_version") != __version__:
        differences.append(f"recorded with tool version {body.get('tool_version')}, replayed with {__version__}")
    tables = render_tables(result, body.get("count_requested"))
    replayed = hashlib.sha256(tables.plan).hexdigest()
    recorded = body["plan_table"]["sha256"]
    if replayed != recorded:
        differences.append("the regenerated plan table differs from the recorded one")
    if hashlib.sha256(tables.exclusions).hexdigest() != body["exclusion_table"]["sha256"]:
        differences.append("the regenerated exclusion table differs from the recorded one")
    for key, data, what in (("plan_notes", tables.plan_notes, "plan table's notes"),
                            ("exclusion_notes", tables.exclusion_notes, "exclusion table's notes")):
        entry = body.get(key)  # records from before the notes files name none
        if entry is not None and hashlib.sha256(data).hexdigest() != entry.get("sha256"):
            differences.append(f"the regenerated {what} differ from the recorded ones")
    return ReplayOutcome(index=rec["index"], identical=not differences, differences=tuple(differences),
                         recorded_sha256=recorded, replayed_sha256=replayed, step_label=tables.step_label)
