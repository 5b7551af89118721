"""``guardband judge``: what the models and the screen say about the chemist's own recipes.

Reads the protocol, the runs and a table of recipes (read by the runs
reader: ``run_id`` names each recipe, one column per factor in protocol
units or with a unit in brackets; response columns may be left out and
are not used), judges every recipe with :func:`planner.step.judge.judge_points`
and appends a ``judge`` record to the campaign's decision log, with copies
of the three inputs and the verdict table, all under the log's lock
(:func:`planner.app.campaign.commit_step`), as a plan does.

The seed and warm start are those a plan on the same inputs would use
(:func:`planner.app.workflow.warm_start_for`), so a plan's proposal fed back
gets the plan's own figures.
"""

from __future__ import annotations

import hashlib
import secrets
from dataclasses import dataclass, field
from pathlib import Path

from guardband.planner.app.campaign import commit_step
from guardband.planner.app.fileio import table_with_notes
from guardband.planner.app.workflow import (LOG_NAME, _RUNS_SUFFIXES, _read_input, _short, cautions_of,
                                            log_records, table_file_names, warm_start_for)
from guardband.planner.errors import OutputError, ProtocolError, RunsDataError
from guardband.planner.inputs.protocol import load_protocol
from guardband.planner.inputs.runs import read_runs_bytes
from guardband.planner.models import blas_limit
from guardband.planner.step.judge import JudgeResult, judge_points
from guardband.safety import ledger

__all__ = ["JudgeOutcome", "run_judge", "judge_table"]

_FLOAT = ".6g"


@dataclass(frozen=True)
class JudgeOutcome:
    """What ``guardband judge`` did."""

    result: JudgeResult
    protocol: object
    seed: int
    seed_drawn: bool
    warm_from: int | None
    record: dict
    log_path: Path
    files: dict = field(default_factory=dict)
    warnings: tuple[str, ...] = ()  # what the readers flagged in the runs and recipes files, naming each


def judge_table(protocol, result: JudgeResult) -> tuple[list[str], list[list]]:
    """One row per recipe: inside?, the objective with its interval, each limit, the joint figure,
    the four rule values, and pass or the screen's reason.

    When a factor states a resolution, a ``grid`` column says whether each
    recipe is on the grid, and a recipe off it is followed by a row for its
    rounding (``<name> (rounded)``, grid ``rounded``), judged by the same models.
    """
    obj = protocol.objective.name
    grid = bool(result.resolution)
    header = ["recipe", *protocol.factor_names, "inside_design_space", *(["grid"] if grid else []),
              f"{obj}_mean", f"{obj}_lo95", f"{obj}_hi95", *[f"p_{n}" for n in protocol.limit_names], "joint",
              "ei", "pi", "bound", "mean", "verdict", "detail"]

    def row(v, where):
        return [v.name, *[float(x) for x in v.x], "yes" if v.inside else "no", *([where] if grid else []),
                v.mean, v.lo95, v.hi95, *[_cell(v.p[n]) for n in protocol.limit_names], v.joint,
                *[_cell(v.values[k]) for k in ("ei", "pi", "bound", "mean")], v.reason, v.detail]

    rows = []
    for v in result.verdicts:
        rows.append(row(v, "off: " + ", ".join(v.off_grid) if v.off_grid else "on"))
        if v.rounded is not None:
            rows.append(row(v.rounded, "rounded"))
    return header, rows


def _cell(x):
    return x if x == x else None  # NaN (a limit that cannot vouch; EI without incumbent) shown empty


def _seed_of(protocol, seed: int | None) -> tuple[int, bool]:
    if seed is None:
        seed = protocol.seed
    if seed is None:
        return secrets.randbelow(2**63), True
    return int(seed), False


def run_judge(protocol_path, runs_path, recipes_path, out_dir, *, seed: int | None = None,
              delimiter: str | None = None, decimal: str | None = None, sheet: str | None = None,
              recipes_sheet: str | None = None, by: str | None = None) -> JudgeOutcome:
    """Judge the recipes and record the judgement in the campaign folder ``out_dir``.

    Every input is read and checked before anything is computed; nothing is
    written unless the judgement is complete. A bad recipes table raises
    :class:`RunsDataError` naming the recipes file, row and column.
    """
    from guardband.planner.app.audit import resolve_operator

    operator = resolve_operator(by)
    protocol_path, runs_path, recipes_path, out_dir = map(Path, (protocol_path, runs_path, recipes_path, out_dir))
    if out_dir.exists() and not out_dir.is_dir():
        raise OutputError(f"{out_dir} exists and is not a folder; --out names a campaign folder")
    protocol_bytes = _read_input(protocol_path, ProtocolError, "protocol")
    protocol = load_protocol(protocol_path)
    runs_bytes = _read_input(runs_path, RunsDataError, "runs")
    read_options = {"delimiter": delimiter, "decimal": decimal, "sheet": sheet}
    runs = read_runs_bytes(runs_bytes, protocol, source=runs_path.name, suffix=runs_path.suffix, **read_options)
    recipes_bytes = _read_input(recipes_path, RunsDataError, "recipes")
    recipe_options = {"delimiter": delimiter, "decimal": decimal, "sheet": recipes_sheet}
    recipes = read_runs_bytes(recipes_bytes, protocol, source=recipes_path.name, suffix=recipes_path.suffix,
                              responses_required=False, **recipe_options)
    if recipes.n_runs == 0:
        raise RunsDataError(f"{recipes_path.name}: the table holds no recipe (a header row and no rows)")
    seed, seed_drawn = _seed_of(protocol, seed)
    log_path = out_dir / LOG_NAME
    if log_path.exists():
        ledger.verify_or_raise(log_path)
    warm, warm_from = warm_start_for(log_records(log_path), protocol.fingerprint, runs.sha256, seed)
    with blas_limit(), ProtocolError.naming(protocol_path):
        result = judge_points(protocol, runs, recipes.X, recipes.run_ids, seed=seed, warm_start=warm)
    header, rows = judge_table(protocol, result)
    warnings = (*[f"runs file {runs_path.name}: {f}" for f in runs.flags],
                *[f"recipes file {recipes_path.name}: {f}" for f in recipes.flags])
    lines = [f"Guardband judgement of given recipes - {protocol.study.title}",
             f"protocol fingerprint {protocol.fingerprint}; runs file sha256 {runs.sha256}; recipes file "
             f"sha256 {recipes.sha256}; seed {seed}; tool version {_version()}",
             *[f"note: {m}" for m in result.messages], *[f"warning: {w}" for w in warnings]]
    table_bytes, notes_bytes = table_with_notes(header, rows, lines, cautions_of(protocol), float_format=_FLOAT)
    table_name, notes_name = table_file_names("judge", table_bytes, notes_bytes)
    files = {
        "judge": out_dir / table_name,
        "judge_notes": out_dir / notes_name,
        "protocol_copy": out_dir / "inputs" / f"protocol-{_short(protocol_bytes)}.toml",
        "runs_copy": out_dir / "inputs" / f"runs-{_short(runs_bytes)}{_suffix(runs_path)}",
        "recipes_copy": out_dir / "inputs" / f"recipes-{_short(recipes_bytes)}{_suffix(recipes_path)}",
    }
    body = {
        "tool_version": _version(), "protocol_fingerprint": protocol.fingerprint, "runs_sha256": runs.sha256,
        "seed": seed, "seed_drawn": seed_drawn, "warm_start": result.warm_start, "warm_start_from": warm_from,
        "mode": result.mode, "incumbent": result.incumbent, "threshold": protocol.screen.threshold,
        "models": [m.to_dict() for m in result.models],
        "verdicts": [v.to_dict(protocol.factor_names) for v in result.verdicts],
        "messages": list(result.messages), "flags": list(recipes.flags), "runs_flags": list(runs.flags),
        "protocol_file": _entry(protocol_path, protocol_bytes, files["protocol_copy"], out_dir),
        "runs_file": {**_entry(runs_path, runs_bytes, files["runs_copy"], out_dir), "read_options": read_options},
        "recipes_file": {**_entry(recipes_path, recipes_bytes, files["recipes_copy"], out_dir),
                         "read_options": recipe_options},
        "judge_table": {"file": files["judge"].name, "sha256": hashlib.sha256(table_bytes).hexdigest()},
        "judge_notes": {"file": files["judge_notes"].name, "sha256": hashlib.sha256(notes_bytes).hexdigest()},
        "cautions": list(cautions_of(protocol)),
        "operator": operator,
    }
    contents = {files["protocol_copy"]: protocol_bytes, files["runs_copy"]: runs_bytes,
                files["recipes_copy"]: recipes_bytes, files["judge"]: table_bytes,
                files["judge_notes"]: notes_bytes}
    created = not out_dir.exists()
    try:
        (out_dir / "inputs").mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create the campaign folder {out_dir}: {exc.strerror or exc}") from None
    try:
        record = commit_step(out_dir, log_path, contents, "judge", body)
    except BaseException:
        if created:
            from guardband.planner.app.workflow import _remove_new_campaign

            _remove_new_campaign(out_dir, log_path)
        raise
    return JudgeOutcome(result, protocol, seed, seed_drawn, warm_from, record, log_path, files, warnings)


def _suffix(path: Path) -> str:
    return path.suffix.lower() if path.suffix.lower() in _RUNS_SUFFIXES else ".csv"


def _entry(path: Path, data: bytes, copy: Path, out_dir: Path) -> dict:
    return {"name": path.name, "sha256": hashlib.sha256(data).hexdigest(),
            "copy": copy.relative_to(out_dir).as_posix()}


def _version() -> str:
    from guardband.planner import __version__

    return __version__
