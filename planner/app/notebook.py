"""Planning from a notebook: runs from a path, CSV text or a pandas DataFrame; tables back as DataFrames.

:func:`plan` is the one call a notebook needs. With ``out`` it runs exactly
what ``guardband plan --out`` runs (:func:`guardband.planner.app.workflow.run_plan`:
the plan and exclusion tables, copies of the inputs and a decision-log
record); without it, the planning step runs in memory and nothing is
logged, which the result says. pandas is needed only here (the optional
extra ``guardband[notebook]``); the rest of the package does not import it.

Decision support only: the result carries the cautions, and a qualified
person reviews every proposed run.
"""

from __future__ import annotations

import html
import secrets
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

from guardband.planner.errors import RunsDataError
from guardband.planner.inputs.protocol import Protocol, load_protocol
from guardband.planner.inputs.runs import RunsTable, parse_runs_text, read_runs as _read_runs_file

__all__ = ["read_runs", "plan", "Plan"]

#: repr of a plan stays under this many characters.
REPR_MAX = 2000
#: The runs reader's warnings a repr lists (each cut to REPR_WARNING_CHARS); the rest are counted.
REPR_WARNINGS = 5
REPR_WARNING_CHARS = 200


def _pandas():
    try:
        import pandas
    except ImportError as exc:  # pragma: no cover - the extra is installed for the tests
        raise ImportError("DataFrames need pandas: pip install 'guardband[notebook]'") from exc
    return pandas


def _protocol(protocol) -> Protocol:
    return protocol if isinstance(protocol, Protocol) else load_protocol(protocol)


def _is_frame(obj) -> bool:
    return type(obj).__name__ == "DataFrame" and hasattr(obj, "to_csv")


def read_runs(runs, protocol, **options) -> RunsTable:
    """The runs of a campaign, checked against the protocol.

    Parameters
    ----------
    runs : path, str or pandas.DataFrame or RunsTable
        A runs file (CSV, tab-separated text or .xlsx), CSV text (a string
        with a line break), or a DataFrame with the runs file's columns
        (``run_id``, one per factor, one per response; units in headers as
        in a file). A RunsTable is returned as it is.
    protocol : path or Protocol
    **options
        ``delimiter``, ``decimal``, ``sheet`` as for a file.

    Returns
    -------
    RunsTable

    Raises
    ------
    RunsDataError
        As for a runs file, naming the row and column.
    """
    protocol = _protocol(protocol)
    if isinstance(runs, RunsTable):
        return runs
    if _is_frame(runs):
        return parse_runs_text(runs.to_csv(index=False), protocol, source="DataFrame", **options)
    if isinstance(runs, str) and "\n" in runs:
        return parse_runs_text(runs, protocol, source="runs text", **options)
    if isinstance(runs, (str, Path)):
        return _read_runs_file(runs, protocol, **options)
    raise RunsDataError(f"runs: expected a path, CSV text or a pandas DataFrame, not {type(runs).__name__}")


@dataclass(frozen=True)
class Plan:
    """One planning step, for a notebook.

    Attributes
    ----------
    result : PlanResult
        Everything the step decided (models, screen, every candidate).
    proposals, exclusions, models : pandas.DataFrame
        The plan table, the exclusion table (every candidate and why) and
        one row per response model, with the columns of the CSV files.
    counts : dict
        Candidates that survived and that each rule excluded.
    seed : int
        The seed used (drawn and reported when neither the call nor the
        protocol gave one).
    log : dict or None
        ``{"file", "record", "head"}`` when the step was logged (``out``
        given), else None.
    cautions : tuple of str
    """

    result: object
    proposals: object
    exclusions: object
    models: object
    counts: dict
    seed: int
    log: dict | None
    cautions: tuple[str, ...] = field(default=())
    warnings: tuple[str, ...] = field(default=())  # about the campaign folder, as `plan --out` warns

    def __repr__(self) -> str:
        r = self.result
        p = r.protocol
        inc = r.incumbent
        counts = ", ".join(f"{k} {v:,}" for k, v in self.counts.items() if v)
        where = (f"logged as record {self.log['record']} of {self.log['file']}" if self.log
                 else "not logged (give out= to write the decision log)")
        lines = [f"Plan of {p.study.title!r}: {len(r.proposals)} proposal(s), mode {r.mode}, "
                 f"rule {p.ranking.rule}, threshold {p.screen.threshold:g}, seed {self.seed}",
                 f"incumbent: {inc['value']:.6g} (run {inc['run_id']})" if inc else
                 "incumbent: none (no run meets every limit)",
                 f"candidates: {counts}", where,
                 "tables: .proposals, .exclusions, .models (DataFrames); everything: .result",
                 *[_cut(f"warning: {w}", REPR_MAX // 4) for w in self.warnings],
                 *_warning_lines(r.flags),
                 "CAUTION: " + " ".join(self.cautions)]
        text = "\n".join(lines)
        return _cut(text, REPR_MAX)

    def _repr_html_(self) -> str:
        head = "".join(f"<div>{html.escape(line)}</div>" for line in repr(self).splitlines()[:-1])
        table = self.proposals.to_html(index=False, float_format=lambda v: f"{v:.4g}", escape=True)
        notes = "".join(f"<li>{html.escape(c)}</li>" for c in self.cautions)
        return f"<div>{head}{table}<p><b>Cautions</b></p><ul>{notes}</ul></div>"


def _warning_lines(flags) -> list[str]:
    """What the runs reader flagged (a value kept outside its bounds, a unit converted), the first
    few in full, so that the cautions after them always fit the repr."""
    lines = [_cut(f"warning: {f}", REPR_WARNING_CHARS) for f in flags[:REPR_WARNINGS]]
    if len(flags) > REPR_WARNINGS:
        lines.append(f"and {len(flags) - REPR_WARNINGS} more warning(s) in .result.flags")
    return lines


def _cut(text: str, n: int) -> str:
    return text if len(text) <= n else text[:n - 3] + "..."


def plan(protocol, runs, *, out=None, seed: int | None = None, count: int | None = None,
         pool: int | None = None, by: str | None = None, **options) -> Plan:
    """Plan the next batch, as ``guardband plan`` does.

    Parameters
    ----------
    protocol : path or Protocol
        A path is needed to log the step (its bytes are copied and hashed).
    runs : path, str, pandas.DataFrame or RunsTable
        As for :func:`read_runs`.
    out : path, optional
        Campaign folder: with it the step is recorded (tables, input copies,
        decision log) exactly as by the command line; without it nothing is
        written.
    seed, count, pool : optional
        As the command's ``--seed``, ``--count`` and ``--pool``.
    by : str, optional
        The operator named in the record (with ``out``).
    **options
        ``delimiter``, ``decimal``, ``sheet`` for a runs file.

    Returns
    -------
    Plan

    Raises
    ------
    GuardbandError
        The same refusals as the command line (bad protocol, bad runs,
        a model that cannot be fitted, an output that may not be written).
    """
    from guardband.planner.app.workflow import cautions_of, exclusion_table, plan_table, run_plan
    from guardband.planner.step import plan_step

    if out is not None:
        if isinstance(protocol, Protocol):
            raise TypeError("plan(out=...): give the protocol's file, so that its bytes can be copied "
                            "and hashed into the decision log")
        outcome = _logged(protocol, runs, out, run_plan, seed=seed, count=count, pool=pool, by=by, **options)
        result, label, seed = outcome.result, outcome.record["body"]["step_label"], outcome.seed
        log = {"file": str(outcome.log_path), "record": outcome.record["index"], "head": outcome.head}
        warnings = outcome.warnings
    else:
        proto = _protocol(protocol)
        table = read_runs(runs, proto, **options)
        seed = seed if seed is not None else (proto.seed if proto.seed is not None else secrets.randbits(62))
        result = plan_step(proto, table, seed=seed, count=count, pool_size=pool)
        label, log, warnings = "notebook", None, ()
    pd = _pandas()
    frame = lambda ht: pd.DataFrame(ht[1], columns=ht[0])
    models = pd.DataFrame([m.to_dict() for m in result.models])
    return Plan(result=result, proposals=frame(plan_table(result, step_label=label)),
                exclusions=frame(exclusion_table(result)), models=models, counts=result.counts(),
                seed=int(seed), log=log, cautions=tuple(cautions_of(result.protocol)), warnings=tuple(warnings))


def _logged(protocol, runs, out, run_plan, *, seed, count, pool, by, **options):
    """run_plan on files: runs given as a DataFrame or text are written to a CSV file first
    (that file's bytes are what the log copies and hashes)."""
    if isinstance(runs, (str, Path)) and not (isinstance(runs, str) and "\n" in runs):
        return run_plan(protocol, runs, out, count=count, seed=seed, pool_size=pool, by=by, **options)
    if isinstance(runs, RunsTable):
        raise TypeError("plan(out=...): give the runs as a file, CSV text or a DataFrame, not a RunsTable")
    text = runs.to_csv(index=False) if _is_frame(runs) else runs
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "runs.csv"
        path.write_text(text, encoding="utf-8")
        return run_plan(protocol, path, out, count=count, seed=seed, pool_size=pool, by=by, **options)
