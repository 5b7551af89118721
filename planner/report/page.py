"""The report page of one planning step: one self-contained HTML file, and writing it with its figures.

The page has no script, no style sheet and no image outside itself: plots
are inline SVG made by matplotlib (the same plots are also written as PNG
files beside it). The page is rendered by Jinja2 with autoescaping, so a
factor or study name from the protocol or the runs file is always shown as
text, never read as markup. The templates are package data in
``templates/`` beside this module.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

import matplotlib as mpl
import numpy as np
from jinja2 import Environment, FileSystemLoader, StrictUndefined

from guardband.planner import __version__
from guardband.planner.app.fileio import atomic_write_bytes, atomic_write_text
from guardband.planner.errors import OutputError
from guardband.planner.inputs.runs import RunsTable
from guardband.planner.step import PlanResult, safe_runs_mask
from guardband.safety import cautions as _cautions
from guardband.safety.calibration import EarnedCalibration

from guardband.planner.report.data import JudgedRecipe, _Geometry, check_map_factors, default_map_factors
from guardband.planner.app.attitude_text import COMPARISON_HEADER, comparison_rows, guidance_lines, price_sentence
from guardband.planner.report.attitude_figures import price_figure, rules_figure
from guardband.planner.report.figures import history_figure, loo_figure, map_figure, slice_figure
from guardband.planner.report.style import REPORT_RC, ReportFigure
from guardband.planner.report.tables import (
    judged_sentence,
    count_rows, fingerprint_rows, fmt, model_rows, near_miss_rows, proposal_rows, proposal_run_id, run_rows,
)

__all__ = ["Report", "ReportFiles", "build_report", "write_report"]

_TEMPLATES = Path(__file__).resolve().parent / "templates"


@dataclass(frozen=True)
class Report:
    """A rendered report, not yet written.

    Attributes
    ----------
    step_label : str
    html : str
        The whole page.
    figures : tuple of ReportFigure
    problems : tuple of str
        What the reader must know before trusting the page (a re-run that
        differs from the record, a superseded record); also on the page.
    """

    step_label: str
    html: str
    figures: tuple[ReportFigure, ...]
    problems: tuple[str, ...] = ()


@dataclass(frozen=True)
class ReportFiles:
    """What :func:`write_report` wrote."""

    step_label: str
    record_index: int | None
    html: Path
    figures: tuple[Path, ...]
    problems: tuple[str, ...] = ()

    def to_dict(self) -> dict:
        return {
            "step_label": self.step_label,
            "record_index": self.record_index,
            "html": str(self.html),
            "figures": [str(p) for p in self.figures],
            "problems": list(self.problems),
        }


@dataclass
class _Figures:
    """The figures of one page, in page order, and what the page says about them."""

    slices: list[ReportFigure] = field(default_factory=list)
    slice_intro: str = ""
    map: ReportFigure | None = None
    loo: ReportFigure | None = None
    loo_rows: list[dict] = field(default_factory=list)
    history: ReportFigure | None = None
    rules: ReportFigure | None = None
    price: ReportFigure | None = None
    notes: list[str] = field(default_factory=list)

    def all(self) -> tuple[ReportFigure, ...]:
        return tuple(f for f in (self.rules, self.price, *self.slices, self.map, self.loo, self.history)
                     if f is not None)


def _environment() -> Environment:
    return Environment(
        loader=FileSystemLoader(str(_TEMPLATES)),
        autoescape=True,
        undefined=StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
    )


def build_report(
    result: PlanResult,
    runs: RunsTable,
    *,
    step_label: str,
    record: dict | None = None,
    log_head: str | None = None,
    log_count: int | None = None,
    map_factors: Sequence[str] | None = None,
    problems: Sequence[str] = (),
    judged: Sequence[JudgedRecipe] = (),
) -> Report:
    """Render the report of one planning step.

    Parameters
    ----------
    result : PlanResult
        The step, with its fitted models (from :func:`planner.step.plan_step`
        or :func:`planner.workflow.rerun_record`).
    runs : RunsTable
        The runs the step used, in file order.
    step_label : str
        The step's label (names the report and its proposals' run ids).
    record : dict, optional
        The step's decision-log record (index, time, hash, file names).
    log_head, log_count : optional
        The decision log's head hash and record count, printed at the top.
    map_factors : two factor names, optional
        The map's factors; default :func:`default_map_factors`.
    problems : sequence of str
        Shown prominently at the top (e.g. the re-run differs from the record).
    judged : sequence of JudgedRecipe
        Recipes judged with this step's models (``guardband judge`` on the
        same protocol and runs), drawn on the slices and the map.

    Returns
    -------
    Report

    Raises
    ------
    ProtocolError
        ``map_factors`` names an unknown or fixed factor.
    """
    p = result.protocol
    geo = _Geometry(result)
    safe = safe_runs_mask(p, runs)
    with mpl.rc_context(REPORT_RC):
        figures = _draw_figures(geo, runs, safe, step_label, map_factors, tuple(judged))
    body = (record or {}).get("body", {})
    earned = _earned_sentence(body)
    if earned is not None and earned[1]:
        problems = [*problems, earned[0]]
    models, warnings = model_rows(result)
    fixed = [f"{f.name} = {fmt(float(geo.ranges[j, 0]))}" for j, f in enumerate(p.factors) if not geo.free[j]]
    free_names = [f.name for j, f in enumerate(p.factors) if geo.free[j]]
    kind = p.study.kind
    inc = result.incumbent
    context = {
        "title": p.study.title,
        "study": p.study,
        "kind": kind,
        "step_label": step_label,
        "cautions": list(_cautions.cautions_for(kind)),
        "dose_cautions": list(_cautions.DOSE) if kind == "dose" else [],
        "problems": list(problems),
        "fingerprints": fingerprint_rows(result, record, log_head, log_count),
        "mode": result.mode,
        "rule": p.ranking.rule if result.mode == "improve" else "joint figure (feasibility first)",
        "judged_sentence": judged_sentence(result),
        "threshold": f"{p.screen.threshold:g}",
        "joint_method": p.screen.joint,
        "incumbent": (f"{fmt(inc['value'])} (run {inc['run_id']})" if inc else
                      "none: no run so far meets every limit"),
        "n_runs_used": result.n_runs_used,
        "n_in_progress": result.n_in_progress,
        "earned": earned[0] if earned is not None else None,
        "messages": list(result.messages),
        "flags": list(result.flags),
        "factor_names": list(p.factor_names),
        "factor_units": [f.unit for f in p.factors],
        "limit_names": list(p.limit_names),
        "limits": [{"text": lim.describe(), "probability": f"{lim.probability:g}", "source": lim.source}
                   for lim in p.limits],
        "objective": p.objective,
        "proposals": proposal_rows(result, step_label),
        "n_requested": body.get("count_requested") or p.batch.size,
        "slice_figures": figures.slices,
        "slice_intro": figures.slice_intro,
        "map_figure": figures.map,
        "loo_figure": figures.loo,
        "loo_rows": figures.loo_rows,
        "history_figure": figures.history,
        "rules_figure": figures.rules,
        "price_figure": figures.price,
        "guidance": guidance_lines(result) if result.rule_picks else [],
        "rule_header": COMPARISON_HEADER,
        "rule_rows": [{"cells": cells, "x": [fmt(e["x"][n]) if e.get("x") else "-" for n in p.factor_names]}
                      for cells, e in zip(comparison_rows(result), result.rule_picks)],
        "price_sentence": price_sentence(result) if result.threshold_price else "",
        "notes": figures.notes,
        "counts": count_rows(result),
        "n_candidates": int(result.pool.shape[0]),
        "near_misses": near_miss_rows(result, free_names),
        "free_names": free_names,
        "models": models,
        "model_warnings": warnings,
        "fixed": fixed,
        "runs": run_rows(p, runs),
        "version": __version__,
    }
    html = _environment().get_template("report.html.j2").render(**context)
    return Report(step_label=step_label, html=html, figures=figures.all(), problems=tuple(problems))


def _earned_sentence(body: dict) -> tuple[str, bool] | None:
    """The calibration the campaign had earned when the step was recorded, in words, and
    whether it contradicts the promise; None for a step without a record of it."""
    d = body.get("calibration_earned")
    if not d:
        return None
    earned = EarnedCalibration.from_dict(d)
    text = earned.sentence()
    return text[0].upper() + text[1:], earned.contradicts


def _draw_figures(geo: _Geometry, runs: RunsTable, safe: np.ndarray, step_label: str,
                  map_factors: Sequence[str] | None, judged: tuple[JudgedRecipe, ...] = ()) -> _Figures:
    """Every figure of the page: a slice figure per proposal, the map, the model checks, the history."""
    result = geo.result
    # salts the SVG ids, so that two pages' figures never share an id
    salt = hashlib.sha256(step_label.encode("utf-8")).hexdigest()[:8]
    figures = _Figures()
    for q in result.proposals:
        made = slice_figure(geo, runs, safe, q, proposal_run_id(step_label, q.rank), salt, judged)
        if made is not None:
            figures.slices.append(made[0])
            figures.slice_intro = made[1]
    if map_factors is not None:
        pair = check_map_factors(result, list(map_factors))
        chosen_how = "chosen with --map"
    else:
        pair = default_map_factors(result)
        chosen_how = "the two factors the models are most sensitive to (shortest length scales)"
    if pair is not None:
        x0, x0_what = _map_origin(geo)
        figures.map = map_figure(geo, runs, safe, result, x0, x0_what, pair, chosen_how, salt, judged)
    else:
        figures.notes.append("No map: fewer than two factors can move in this design space.")
    figures.loo, figures.loo_rows = loo_figure(geo, salt)
    figures.history = history_figure(geo, runs, safe, result, list(runs.run_ids), salt)
    figures.rules = rules_figure(result, salt)
    figures.price = price_figure(result, salt)
    return figures


def _map_origin(geo: _Geometry) -> tuple[np.ndarray, str]:
    """Where the map holds the factors it does not move, and those values in words.

    The first proposal; without one, the centre of the design space with
    each discrete factor at its nearest feasible level, or, when that point
    is outside the design space, the first candidate inside it.
    """
    result = geo.result
    if result.proposals:
        return np.asarray(result.proposals[0].x, dtype=float), "the first proposal's values"
    x0, x0_what = geo.centre.copy(), "the centre of the design space"
    for j in geo.levels:
        fl = geo.feasible_levels(j)
        x0[j] = fl[np.argmin(np.abs(fl - x0[j]))]
    if not geo.space.contains(x0[None, :])[0]:
        x0 = result.pool[int(np.argmax(geo.space.contains(result.pool)))]
        x0_what = "a candidate inside the design space"
    return np.asarray(x0, dtype=float), x0_what


def write_report(report: Report, folder: str | Path, *, record_index: int | None = None) -> ReportFiles:
    """Write ``report-<label>.html`` and ``figures-<label>/*.png`` into ``folder``.

    Each file is written atomically.

    Raises
    ------
    OutputError
        A file could not be written.
    """
    folder = Path(folder)
    fig_dir = folder / f"figures-{report.step_label}"
    try:
        fig_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"could not create {fig_dir}: {exc.strerror or exc}") from exc
    paths = []
    for fig in report.figures:
        path = fig_dir / f"{fig.name}.png"
        atomic_write_bytes(path, fig.png)
        paths.append(path)
    html_path = folder / f"report-{report.step_label}.html"
    atomic_write_text(html_path, report.html)
    return ReportFiles(report.step_label, record_index, html_path, tuple(paths), report.problems)
