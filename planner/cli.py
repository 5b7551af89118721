"""The ``guardband`` command line: parse, call one function, print.

Data goes to stdout in the format asked for (``table``, ``csv``, ``json``);
messages go to stderr. A ``csv`` table on stdout is a plain table (see
:mod:`planner.app.fileio`); its notes and cautions go to stderr, as a
written table's go to its ``.notes.txt`` file. Exit codes (see
:mod:`planner.errors`):

====  ==========================================================
0     ok
2     usage error (unknown option, missing argument)
3     bad protocol, or its design space is empty or a single point
4     bad runs data, more runs than --max-runs, or a bad recipes table (judge)
5     a decision log or a file it names failed verification, or a replay differed
6     no candidate passed the safety screen
7     a model could not be fitted or cannot be trusted
8     an output could not be written, or its path is refused
====  ==========================================================
"""

from __future__ import annotations

import functools
import json
import os
import sys
from enum import Enum
from pathlib import Path
from typing import Optional

import typer

from guardband.planner import __version__
from guardband.planner.settings import MAX_RUNS_DEFAULT
from guardband.planner.errors import (EXIT_NO_SAFE, EXIT_PROTOCOL, EXIT_VERIFY, GuardbandError, OutputError,
                                      ProtocolError)
from guardband.planner.app.fileio import (atomic_write_many, atomic_write_text, notes_path, notes_text,
                                         split_comment_lines, table_with_notes, write_csv_text)
from guardband.planner.app.textable import render_table, wrap_text
from guardband.planner.inputs.names import shown

app = typer.Typer(
    name="guardband",
    help=(
        "Plan the next runs of a formulation or dose study: Gaussian-process models, "
        "a safety screen on every limit, and a tamper-evident decision log. "
        "Decision support only: a qualified person reviews every proposed run."
    ),
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)


class Format(str, Enum):
    table = "table"
    csv = "csv"
    json = "json"


FORMAT_HELP = "Output format on stdout: table (readable), csv or json."
BY_HELP = ("Operator name recorded on the record (default: $GUARDBAND_OPERATOR, else the login "
           "name; the record says which).")


class Delimiter(str, Enum):
    comma = ","
    semicolon = ";"
    tab = "tab"


class Decimal(str, Enum):
    point = "."
    comma = ","


def _nonempty_out(value):
    """``--out ""`` would name the current folder; refuse it as a usage error."""
    if value is not None and not str(value).strip():
        raise typer.BadParameter("is empty; give a file or folder name", param_hint="--out")
    return value


def _echo(text: str = "", **kwargs) -> None:
    """Print text that may hold input text: control and hidden characters are shown escaped."""
    typer.echo(shown(str(text)), **kwargs)


def _show(text: str = "") -> None:
    """Print prose or a table of the table format, wrapped to fit the terminal width."""
    _echo(wrap_text(str(text)))


def _err(text: str = "") -> None:
    _echo(text, err=True)


def _err_notes(text: str) -> None:
    """The notes and cautions of a CSV table printed on stdout: to stderr, line by line."""
    for line in text.rstrip("\n").split("\n"):
        _err(line)


def _table_and_notes_files(path, text: str) -> dict:
    """A CSV text that begins with ``#`` lines, as two files: the plain table and its notes file."""
    notes, table = split_comment_lines(text)
    return {path: table, notes_path(path): notes_text(notes, ())}


def _cautions_block(cautions) -> str:
    return "CAUTIONS:\n" + "\n".join(f"  - {c}" for c in cautions)


def _guarded(func):
    """Turn a domain error into ``Error: ...`` on stderr and its exit code."""

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        try:
            return func(*args, **kwargs)
        except GuardbandError as exc:
            _err(f"Error: {exc}")
            raise typer.Exit(exc.exit_code) from None

    return wrapper


def _json(obj) -> str:
    from guardband.safety.canonical import to_jsonable

    return json.dumps(to_jsonable(obj), indent=2, ensure_ascii=False, allow_nan=False)


@app.callback(invoke_without_command=True)
def _root(
    version: bool = typer.Option(False, "--version", help="Print the tool version and exit."),
) -> None:
    if version:
        _echo(f"guardband {__version__}")
        raise typer.Exit(0)


# ------------------------------------------------------------------- check
@app.command()
@_guarded
def check(
    protocol: Path = typer.Argument(..., help="The protocol TOML file."),
    format: Format = typer.Option(Format.table, "--format", "-f", help=FORMAT_HELP),
) -> None:
    """Check a protocol: validity, empty design space, reachable factor ranges, centre, fingerprint."""
    from guardband.planner.app.workflow import check_protocol

    report = check_protocol(protocol)
    data = report.to_dict()
    rows = report.rows()
    if format is Format.json:
        _echo(_json(data))
    elif format is Format.csv:
        _echo(write_csv_text([list(r.values()) for r in rows], list(rows[0].keys())), nl=False)
        _err_notes(notes_text([f"fingerprint {report.protocol.fingerprint}", *data["notes"]], data["cautions"]))
    else:
        p = report.protocol
        _show(f"{p.study.title} (version {p.study.version}, {p.study.kind} study, by {p.study.author})")
        _show(f"fingerprint: {p.fingerprint}")
        _show(render_table(list(rows[0].keys()), [list(r.values()) for r in rows]))
        if p.limits:
            _show("limits: " + "; ".join(
                f"{lim.describe()} with probability >= {lim.probability:g}" for lim in p.limits))
        for line in data["notes"]:
            _show(line)
        _show(f"screen: joint figure ({p.screen.joint}) >= {p.screen.threshold:g}; "
                   f"ranking: {p.ranking.rule}; batch size {p.batch.size}")
        for line in data["guidance"]:
            _show(f"rule: {line}")
        _show(_cautions_block(data["cautions"]))
    for line in data["threshold_warnings"]:
        _err(f"warning: {line}")
    if report.empty:
        _err(f"Error: {protocol.name}: the design space is empty. Conflicting constraints:")
        for c in report.conflicts:
            _err(f"  - {c}")
        raise typer.Exit(EXIT_PROTOCOL)
    _err(f"ok: {report.message}")


# ------------------------------------------------------------------- start
@app.command()
@_guarded
def start(
    protocol: Path = typer.Argument(..., help="The protocol TOML file."),
    runs: int = typer.Option(..., "--runs", "-n", min=1, max=10000, help="How many starting runs."),
    out: Optional[str] = typer.Option(None, "--out", "-o", callback=_nonempty_out,
                                      help="Write the design as CSV to this file (its notes and cautions "
                                           "to the same name with .notes.txt)."),
    seed: Optional[int] = typer.Option(None, "--seed", help="Random seed (default: the protocol's)."),
    replace: bool = typer.Option(False, "--replace", help="Overwrite --out when it already exists and is "
                                 "not empty (refused otherwise: it may be a runs file with measurements)."),
    format: Format = typer.Option(Format.table, "--format", "-f", help=FORMAT_HELP),
) -> None:
    """Make a starting design for a campaign with no runs yet, ready to fill in."""
    from guardband.planner.inputs.protocol import load_protocol
    from guardband.planner.app.workflow import cautions_of, start_design

    if out is not None and not replace:
        _refuse_to_overwrite(out)
    p = load_protocol(protocol)
    seed_used = seed if seed is not None else (p.seed if p.seed is not None else 0)
    with ProtocolError.naming(protocol):
        header, rows, notes = start_design(p, runs, seed=seed_used)
    cautions = cautions_of(p)
    comments = [f"Guardband starting design - {p.study.title}",
                f"protocol fingerprint {p.fingerprint}; seed {seed_used}; tool version {__version__}",
                "fill in the response columns as runs are measured; leave a cell empty if not measured",
                *notes]
    table, notes_bytes = table_with_notes(header, rows, comments, cautions, float_format=".6g")
    if out is not None:
        atomic_write_many({out: table, notes_path(out): notes_bytes})
        _err(f"wrote {len(rows)} starting runs to {out} (notes and cautions: {notes_path(out)})")
    if format is Format.json:
        _echo(_json({"header": header, "rows": rows, "seed": seed_used, "notes": notes,
                          "cautions": list(cautions)}))
    elif format is Format.csv:
        _echo(table.decode("utf-8"), nl=False)
        _err_notes(notes_bytes.decode("utf-8"))
    else:
        _show(render_table(header, rows))
        for n in notes:
            _show(f"note: {n}")
        _show(_cautions_block(cautions))


def _refuse_to_overwrite(out: str) -> None:
    """A starting design never silently replaces a file with content: it may hold measurements."""
    if os.path.isfile(out) and not os.path.islink(out) and os.path.getsize(out) > 0:
        raise OutputError(f"{out} already exists and is not empty (it may be a runs file with measurements); "
                          "nothing was written: give another --out, or --replace to overwrite it")


# -------------------------------------------------------------------- plan
@app.command()
@_guarded
def plan(
    protocol: Path = typer.Argument(..., help="The protocol TOML file."),
    runs: Path = typer.Argument(..., help="The runs file (CSV, tab-separated text or .xlsx) with the runs made so far."),
    out: str = typer.Option(..., "--out", "-o", callback=_nonempty_out,
                            help="Campaign folder: plan, exclusions, decision log."),
    count: Optional[int] = typer.Option(None, "--count", "-k", min=1, max=100,
                                        help="How many runs to propose (default: the protocol's batch size)."),
    seed: Optional[int] = typer.Option(None, "--seed", min=0, max=2**63 - 1,
                                       help="Random seed (default: the protocol's; else drawn and recorded)."),
    pool: Optional[int] = typer.Option(None, "--pool", min=50, max=500000, help="Candidate pool size (default: the protocol's)."),
    delimiter: Optional[Delimiter] = typer.Option(None, "--delimiter",
                                                  help="Field separator of a text runs file (default: found from the header line)."),
    decimal: Optional[Decimal] = typer.Option(None, "--decimal",
                                              help="Decimal mark of the runs file's numbers (default: found from the cells)."),
    sheet: Optional[str] = typer.Option(None, "--sheet", help="Sheet of an .xlsx runs file (default: the first)."),
    report: bool = typer.Option(False, "--report", help="Also write the HTML report and PNG figures of this step into --out."),
    by: Optional[str] = typer.Option(None, "--by", help=BY_HELP),
    max_runs: int = typer.Option(MAX_RUNS_DEFAULT, "--max-runs", min=1,
                                 help="Most runs (rows) the step takes; more are refused (fitting time grows with their cube)."),
    format: Format = typer.Option(Format.table, "--format", "-f", help=FORMAT_HELP),
) -> None:
    """Plan the next batch: fit the models, screen every candidate, rank, propose, log."""
    from guardband.planner.app.plan_text import figures_table, settings_table
    from guardband.planner.app.workflow import cautions_of, run_plan

    outcome = run_plan(protocol, runs, Path(out), count=count, seed=seed, pool_size=pool,
                       delimiter=delimiter.value if delimiter else None,
                       decimal=decimal.value if decimal else None, sheet=sheet, by=by, max_runs=max_runs)
    result = outcome.result
    cautions = cautions_of(result.protocol)
    if format is Format.json:
        body = dict(outcome.record["body"])
        body["log"] = {"file": outcome.log_path.name, "head": outcome.head, "count": outcome.count}
        _echo(_json(body))
    elif format is Format.csv:
        _echo(outcome.files["plan"].read_text(encoding="utf-8"), nl=False)
        _err_notes(outcome.files["plan_notes"].read_text(encoding="utf-8"))
    else:
        p = result.protocol
        inc = result.incumbent
        label = outcome.record["body"]["step_label"]
        _show(f"{p.study.title}: {result.n_runs_used} runs used, {result.n_in_progress} in progress"
              + (" (treated as already chosen: they shaped the batch)" if result.n_in_progress else ""))
        _show(f"mode: {result.mode}; incumbent: "
              + (f"{inc['value']:.6g} (run {inc['run_id']})" if inc else "none (no run meets every limit)"))
        warm_from = outcome.record["body"].get("warm_start_from")
        if warm_from is not None:
            _show(f"warm start: the model search began at the hyperparameters of record {warm_from}")
        counts = result.counts()
        _show("candidates: " + ", ".join(f"{k} {v}" for k, v in counts.items() if v))
        for m in result.messages:
            _show(f"note: {m}")
        if outcome.calibration is not None:
            _show(outcome.calibration.sentence())
        if result.proposals:
            _show("proposed runs (settings; every column is in the CSV plan table):")
            _show(settings_table(result, label))
            _show("what the models say about them:")
            _show(figures_table(result, label))
        for prop in result.proposals:
            _show(f"why rank {prop.rank}: {prop.reason}")
        _echo_attitudes(result)
        _show(f"decision log: {outcome.log_path} (records {outcome.count}, head {outcome.head})")
        _show(_cautions_block(cautions))
    if outcome.seed_drawn:
        _err(f"seed used: {outcome.seed} (drawn; recorded in the log)")
    for f in (*result.flags, *outcome.warnings):
        _err(f"warning: {f}")
    if outcome.calibration is not None and outcome.calibration.contradicts:
        _err("warning: " + outcome.calibration.sentence())
    _err(f"wrote {outcome.files['plan']} and {outcome.files['exclusions']}, each with its notes and cautions "
         f"in a .notes.txt file of the same name")
    if report:
        from guardband.planner.report import report_plan

        _err(f"wrote {report_plan(outcome).html}")
    if not result.proposals:
        _err("Error: no candidate passed the safety screen; see the exclusion table for why")
        raise typer.Exit(EXIT_NO_SAFE)


@app.command()
@_guarded
def judge(
    protocol: Path = typer.Argument(..., help="The protocol TOML file."),
    runs: Path = typer.Argument(..., help="The runs file (CSV, tab-separated text or .xlsx) with the runs made so far."),
    recipes: Path = typer.Argument(..., help="Your recipes: run_id (a name) and one column per factor, "
                                   "as in a runs file (CSV, tab-separated text or .xlsx)."),
    out: str = typer.Option(..., "--out", "-o", callback=_nonempty_out,
                            help="Campaign folder: the verdict table and the decision log."),
    seed: Optional[int] = typer.Option(None, "--seed", min=0, max=2**63 - 1,
                                       help="Random seed of the model fits (default: the protocol's; else drawn and recorded)."),
    delimiter: Optional[Delimiter] = typer.Option(None, "--delimiter", help="Field separator of text files."),
    decimal: Optional[Decimal] = typer.Option(None, "--decimal", help="Decimal mark of the numbers."),
    sheet: Optional[str] = typer.Option(None, "--sheet", help="Sheet of an .xlsx runs file (default: the first)."),
    recipes_sheet: Optional[str] = typer.Option(None, "--recipes-sheet", help="Sheet of an .xlsx recipes file."),
    by: Optional[str] = typer.Option(None, "--by", help=BY_HELP),
    format: Format = typer.Option(Format.table, "--format", "-f", help=FORMAT_HELP),
) -> None:
    """Judge your own recipes as the plan judges its candidates, and log the judgement."""
    from guardband.planner.app.judge import judge_table, run_judge
    from guardband.planner.app.workflow import cautions_of

    outcome = run_judge(protocol, runs, recipes, Path(out), seed=seed,
                        delimiter=delimiter.value if delimiter else None,
                        decimal=decimal.value if decimal else None, sheet=sheet, recipes_sheet=recipes_sheet, by=by)
    if format is Format.json:
        _echo(_json(dict(outcome.record["body"])))
    elif format is Format.csv:
        _echo(outcome.files["judge"].read_text(encoding="utf-8"), nl=False)
        _err_notes(outcome.files["judge_notes"].read_text(encoding="utf-8"))
    else:
        res, p = outcome.result, outcome.protocol
        inc = res.incumbent
        _show(f"{p.study.title}: {len(res.verdicts)} recipe(s) judged; mode: {res.mode}; incumbent: "
                   + (f"{inc['value']:.6g} (run {inc['run_id']})" if inc else "none (no run meets every limit)"))
        for m in res.messages:
            _show(f"note: {m}")
        header, rows = judge_table(p, res)
        units = {f.name: f.unit for f in p.factors}  # the recipes as judged: in the protocol's units
        _show(render_table([h + (f" [{units[h]}]" if units.get(h) else "") for h in header], rows))
        _show(f"decision log: {outcome.log_path} (record {outcome.record['index']}, kind judge)")
        _show(_cautions_block(cautions_of(p)))
    if outcome.seed_drawn:
        _err(f"seed used: {outcome.seed} (drawn; recorded in the log)")
    if format is not Format.csv:  # with csv, the notes (these warnings among them) are on stderr already
        for w in outcome.warnings:
            _err(f"warning: {w}")
    _err(f"wrote {outcome.files['judge']} and {outcome.files['judge_notes'].name}")


def _echo_attitudes(result) -> None:
    """What each rule would propose and what the threshold costs (the plan's table output)."""
    from guardband.planner.app.attitude_text import (COMPARISON_HEADER, PRICE_HEADER, comparison_rows,
                                                     guidance_lines, price_rows, price_sentence)

    if result.rule_picks:
        what = "its true rate" if result.protocol.objective.kind == "binomial" else "the next measured result"
        _show(f"what each ranking rule would propose first (figures for {what}):")
        _show(render_table(COMPARISON_HEADER, comparison_rows(result)))
        for line in guidance_lines(result):
            _show(f"rule: {line}")
    if result.threshold_price:
        _show("the price of the threshold (best predicted objective among candidates that pass):")
        _show(render_table(PRICE_HEADER, price_rows(result)))
        sentence = price_sentence(result)
        if sentence:
            _show(f"threshold: {sentence}")


# ------------------------------------------------------------------ verify
@app.command()
@_guarded
def verify(
    log: Path = typer.Argument(..., help="The decision log (decisions.jsonl)."),
    expect_head: Optional[str] = typer.Option(None, "--expect-head", help="Head hash printed by an earlier report."),
    expect_count: Optional[int] = typer.Option(None, "--expect-count", min=0, help="Number of records the log must have."),
    accept_empty: bool = typer.Option(False, "--accept-empty", help="Let a log with no record pass "
                                      "(by default an empty log fails: it proves nothing)."),
    summary: bool = typer.Option(False, "--summary", help="Print the reviewer's summary of every planning step "
                                 "(inputs, exclusion counts, near misses, corrections) once the log verifies."),
    format: Format = typer.Option(Format.table, "--format", "-f", help=FORMAT_HELP),
) -> None:
    """Verify a decision log's hash chain and every file its records name; name the first problem."""
    from guardband.planner.app.audit import verify_campaign

    try:
        verdict = verify_campaign(log, expect_head=expect_head, expect_count=expect_count,
                                  accept_empty=accept_empty)
    except ValueError as exc:
        _err(f"Error: {exc}")
        raise typer.Exit(2)
    result = verdict.log
    if summary and verdict.ok:
        from guardband.planner.app.review import summarize_log

        review = summarize_log(log)
        text = review.render(format.value)
        _show(text.rstrip("\n")) if format is Format.table else _echo(text, nl=False)
        if format is Format.csv:
            _err_notes(review.csv_notes())
    elif format is Format.json:
        _echo(_json(verdict.to_dict()))
    elif format is Format.csv:
        d = result.to_dict()
        d.update({"ok": verdict.ok, "problem": verdict.problem,
                  "files_checked": verdict.files.checked if verdict.files else None})
        _echo(write_csv_text([list(d.values())], list(d.keys())), nl=False)
    else:
        if verdict.ok:
            files = f"; {verdict.files.checked} named files match their SHA-256" if verdict.files else ""
            _show(f"ok: {result.count} records{files}")
            _show(f"head: {result.head}")
        else:
            _show(f"FAILED: {verdict.problem}")
    for note in verdict.notes:
        _err(f"note: {note}")
    if not verdict.ok:
        _err(f"Error: decision log {log} failed verification: {verdict.problem}")
        raise typer.Exit(EXIT_VERIFY)


# --------------------------------------------------------------- supersede
@app.command()
@_guarded
def supersede(
    log: Path = typer.Argument(..., help="The decision log (decisions.jsonl)."),
    record: int = typer.Option(..., "--record", "-r", min=0, help="Index of the record that is superseded."),
    reason: str = typer.Option(..., "--reason", help="Why, in a sentence (recorded)."),
    by: Optional[str] = typer.Option(None, "--by", help=BY_HELP),
    format: Format = typer.Option(Format.table, "--format", "-f", help=FORMAT_HELP),
) -> None:
    """Append a correction: an earlier record is superseded, why, and by whom (nothing is erased)."""
    from guardband.planner.app.audit import supersede_record

    rec = supersede_record(log, record, reason, by=by)
    if format is Format.json:
        _echo(_json(rec))
    else:
        op = rec["body"]["operator"]
        _show(f"record {rec['index']} supersedes record {record} (by {op['name']}, from {op['source']})")
        _show(f"reason: {rec['body']['reason']}")
        _show(f"head: {rec['hash']}")


# ------------------------------------------------------------------ replay
@app.command()
@_guarded
def replay(
    log: Path = typer.Argument(..., help="The decision log (decisions.jsonl)."),
    record: int = typer.Option(..., "--record", "-r", min=0, help="Index of the plan record to re-run (0 is the first)."),
    format: Format = typer.Option(Format.table, "--format", "-f", help=FORMAT_HELP),
) -> None:
    """Re-run a recorded planning step from its recorded inputs and compare the plans."""
    from guardband.planner.app.workflow import replay_record

    outcome = replay_record(log, record)
    if format is Format.json:
        _echo(_json(outcome.to_dict()))
    elif format is Format.csv:
        d = outcome.to_dict()
        d["differences"] = "; ".join(d["differences"])
        _echo(write_csv_text([list(d.values())], list(d.keys())), nl=False)
    else:
        if outcome.identical:
            _show(f"identical: record {record} replays to the same plan (sha256 {outcome.replayed_sha256})")
        else:
            _show(f"DIFFERENT: record {record}: " + "; ".join(outcome.differences))
    if not outcome.identical:
        raise typer.Exit(EXIT_VERIFY)


# ------------------------------------------------------------------ report
def _map_pair(text: Optional[str]) -> Optional[tuple[str, str]]:
    if text is None:
        return None
    parts = [p.strip() for p in text.split(",")]
    if len(parts) != 2 or not all(parts):
        raise typer.BadParameter(f"give two factor names separated by a comma, e.g. mcc,force (got {text!r})",
                                 param_hint="--map")
    return parts[0], parts[1]


@app.command()
@_guarded
def report(
    folder: Path = typer.Argument(..., help="Campaign folder written by `guardband plan --out` (holds decisions.jsonl)."),
    map: Optional[str] = typer.Option(None, "--map", help="Two factors for the map, as a,b "
                                      "(default: the two the models are most sensitive to)."),
    format: Format = typer.Option(Format.table, "--format", "-f", help=FORMAT_HELP),
) -> None:
    """Write a self-contained HTML report (and PNG figures) for every planning step in a folder."""
    from guardband.planner.report import report_folder

    written = report_folder(folder, map_factors=_map_pair(map))
    if format is Format.json:
        _echo(_json([w.to_dict() for w in written]))
    elif format is Format.csv:
        rows = [[w.record_index, w.step_label, str(w.html), len(w.figures), "; ".join(w.problems)] for w in written]
        _echo(write_csv_text(rows, ["record", "step_label", "report", "figures", "problems"]), nl=False)
    else:
        for w in written:
            _echo(f"record {w.record_index}: {w.html} ({len(w.figures)} figures in {w.html.parent / ('figures-' + w.step_label)})")
    for w in written:
        for problem in w.problems:
            _err(f"warning: report {w.html.name}: {problem}")
    if any("different plan table" in p for w in written for p in w.problems):
        _err("Error: at least one recorded step did not re-run to its recorded plan; see the reports")
        raise typer.Exit(EXIT_VERIFY)


# ---------------------------------------------------------------- simulate
def _progress_bar(label: str):
    """``(progress, close)``: a progress bar on stderr when both streams are a terminal, else nothing."""
    show = sys.stdout.isatty() and sys.stderr.isatty()
    bar: dict = {}

    def progress(done: int, total: int) -> None:
        if not show:
            return
        if "bar" not in bar:
            bar["bar"] = typer.progressbar(length=total, label=label, file=sys.stderr)
            bar["bar"].__enter__()
        bar["bar"].update(1)

    def close() -> None:
        if "bar" in bar:
            bar["bar"].__exit__(None, None, None)

    return progress, close


@app.command()
@_guarded
def simulate(
    protocol: Optional[str] = typer.Argument(
        None, help="With --scenarios: the protocol whose own factors, limits and settings are simulated. "
                   "With --problem: the protocol whose planner settings are used; '-' uses the problem's own."),
    problem: Optional[str] = typer.Option(None, "--problem", "-p",
                                          help="Built-in test problem: gramacy, tablet, dose or coating."),
    scenarios: Optional[Path] = typer.Option(None, "--scenarios", help="Scenario file (TOML): true responses "
                                             "of the protocol's own factors (see the README)."),
    vary: list[str] = typer.Option([], "--vary", help="Sweep a setting: KEY=V1,V2 with KEY threshold, rule, "
                                   "batch, start, budget, max_step or step (full, or light: a cheaper step "
                                   "for large sweeps, see the README); repeat for several."),
    budget: Optional[int] = typer.Option(None, "--budget", "-b", min=1, max=10000,
                                         help="Planned runs per campaign (default: the problem's or the file's)."),
    seeds: int = typer.Option(5, "--seeds", "-s", min=1, max=10000, help="Campaigns per strategy or setting."),
    start: Optional[int] = typer.Option(None, "--start", min=3, max=10000,
                                        help="Starting runs per campaign (default: the problem's or the file's)."),
    noise: list[str] = typer.Option([], "--noise", help="Measurement noise: a scale of the stated noise "
                                    "(0 off, 1 as stated) or, for a problem, NAME=SD; repeat for several."),
    workers: Optional[int] = typer.Option(None, "--workers", "-w", min=1, max=256,
                                          help="Worker processes (default: min(2, CPUs))."),
    scheduler: Optional[str] = typer.Option(None, "--scheduler", help="Run a sweep's campaigns on this Dask "
                                            "distributed scheduler (e.g. tcp://10.0.0.5:8786)."),
    within: Optional[float] = typer.Option(None, "--within", min=0.0, help="Distance to the optimum "
                                           "(objective units) for 'runs until within' (default 1% of the "
                                           "objective's range under the truth)."),
    strategies: str = typer.Option("all", "--strategies", help="Comma-separated: protocol, ei, pi, "
                                   "bound, mean, random, classical, screen-off, textbook (EI times the limits' "
                                   "probabilities, no screen); or all (--problem only)."),
    peers: Optional[str] = typer.Option(None, "--peers", help="Sweep: also run the planner's peers on the "
                                        "same starting runs and truths: random, classical (comma-separated) "
                                        "or all."),
    seed: int = typer.Option(0, "--seed", min=0, max=2**63 - 1, help="Base seed."),
    pool: Optional[int] = typer.Option(None, "--pool", min=50, max=500000,
                                       help="Candidate pool of every planning step (default: the settings')."),
    settings_from_problem: bool = typer.Option(False, "--settings-from-problem",
                                               help="Use the problem's own planner settings (same as '-')."),
    out: Optional[str] = typer.Option(None, "--out", "-o", callback=_nonempty_out,
                                      help="Also write the CSV to this file (its notes and cautions to the "
                                           "same name with .notes.txt)."),
    out_dir: Optional[str] = typer.Option(None, "--out-dir", callback=_nonempty_out,
                                          help="Sweep: write the summary CSV, one CSV "
                                           "per setting and scenario, and sweep.html into this folder."),
    format: Format = typer.Option(Format.table, "--format", "-f", help=FORMAT_HELP),
) -> None:
    """Simulate campaigns: on a built-in problem, or on scenarios of your own protocol, over settings."""
    import time

    from guardband.planner.app.simulate_options import OptionError

    if (problem is None) == (scenarios is None):
        raise typer.BadParameter("give either --problem NAME or --scenarios FILE", param_hint="--problem")
    sweep = (scenarios is not None or bool(vary) or scheduler is not None or out_dir is not None
             or peers is not None)
    if sweep and strategies != "all":
        raise typer.BadParameter("--strategies compares strategies on a built-in problem; a sweep varies "
                                 "settings (--vary) and runs peers with --peers", param_hint="--strategies")
    if protocol is None and not settings_from_problem and scenarios is None:
        raise typer.BadParameter("give a settings protocol (a TOML file), '-' or --settings-from-problem",
                                 param_hint="PROTOCOL")
    if protocol not in (None, "-") and settings_from_problem:
        raise typer.BadParameter("give either a settings protocol or --settings-from-problem, not both",
                                 param_hint="PROTOCOL")
    progress, close = _progress_bar("simulating")
    began = time.perf_counter()
    try:
        if sweep:
            _simulate_sweep(protocol, scenarios, problem, vary, noise, start, budget, seeds, seed, within,
                            workers, scheduler, pool, out, out_dir, format, progress, close, peers)
        else:
            _simulate_problem(None if settings_from_problem else protocol, problem, budget, seeds, start, noise,
                              strategies, workers, seed, pool, out, format, progress, close)
    except OptionError as exc:
        raise typer.BadParameter(str(exc)) from None
    finally:
        close()
    _err(f"simulated in {time.perf_counter() - began:.1f} s")


def _simulate_problem(settings, problem, budget, seeds, start, noise, strategies, workers, seed, pool, out,
                      format, progress, close) -> None:
    from guardband.planner.app.simulate_options import OptionError, simulate_from_options, world_note
    from guardband.planner.simulation import get_problem

    result = simulate_from_options(problem, settings, budget=budget, seeds=seeds, start=start, noise_values=noise,
                                   strategies=strategies, workers=workers, seed=seed, pool_size=pool,
                                   progress=progress)
    close()
    csv_text = result.csv_text()
    notes, table = split_comment_lines(csv_text)
    if out is not None:
        atomic_write_many(_table_and_notes_files(out, csv_text))
    if format is Format.json:
        _echo(_json(result.to_dict()))
    elif format is Format.csv:
        _echo(table, nl=False)
        _err_notes(notes_text(notes, ()))
    else:
        _show(result.table_text())
        _show(_cautions_block(result.cautions()))
    try:
        note = world_note(get_problem(problem), settings)
    except ValueError as exc:
        raise OptionError(str(exc)) from None
    if note:
        _err(f"note: {note}")
    n = sum(len(v) for k, v in result.histories.items() if k not in result.same_as)
    _err(f"{n} campaigns with {result.workers} worker(s)" + (f"; wrote {out}" if out is not None else ""))


def _simulate_sweep(protocol, scenarios, problem, vary, noise, start, budget, seeds, seed, within, workers,
                    scheduler, pool, out, out_dir, format, progress, close, peers=None) -> None:
    from guardband.planner.app.simulate_options import sweep_from_options
    from guardband.planner.models import default_workers
    from guardband.planner.report.sweep import sweep_html

    result, title, kind = sweep_from_options(
        protocol, scenarios_path=scenarios, problem=problem, vary_values=vary, noise_values=noise, start=start,
        budget=budget, peers=peers, seeds=seeds, seed=seed, within=within,
        workers=default_workers() if workers is None else workers, scheduler=scheduler, pool_size=pool,
        progress=progress)
    close()
    out = Path(out) if out is not None else None
    out_dir = Path(out_dir) if out_dir is not None else None
    files: dict = {}
    if out is not None:
        files.update(_table_and_notes_files(out, result.csv_text()))
    if out_dir is not None:
        for name, text in result.files().items():
            files.update(_table_and_notes_files(out_dir / name, text))
        files[out_dir / "sweep.html"] = sweep_html(result, title=title, kind=kind)
    if files:
        if out_dir is not None:
            try:
                out_dir.mkdir(parents=True, exist_ok=True)
            except OSError as exc:
                raise OutputError(f"{out_dir}: cannot make the folder ({exc.strerror})") from None
        atomic_write_many(files)
    if format is Format.json:
        _echo(_json(result.to_dict()))
    elif format is Format.csv:
        notes, table = split_comment_lines(result.csv_text())
        _echo(table, nl=False)
        _err_notes(notes_text(notes, ()))
    else:
        _show(result.table_text())
        _show(_cautions_block(result.cautions()))
    for note in result.notes:
        _err(note)
    _err(f"{len(result.cells) * result.seeds} campaigns on {result.runner}"
         + (f"; wrote {len(files)} file(s)" + (f" into {out_dir}" if out_dir is not None else "") if files else ""))


# --------------------------------------------------------------- reference
class RefFormat(str, Enum):
    markdown = "markdown"
    json_schema = "json-schema"


@app.command()
@_guarded
def reference(
    format: RefFormat = typer.Option(RefFormat.markdown, "--format", "-f",
                                     help="markdown (every setting: type, default, unit, allowed values) "
                                          "or json-schema (for editors)."),
    out: Optional[str] = typer.Option(None, "--out", "-o", callback=_nonempty_out,
                                      help="Write to this file instead of stdout."),
) -> None:
    """Write the protocol reference or the protocol's JSON Schema, made from the schema itself."""
    from guardband.planner.inputs.reference import protocol_json_schema_text, protocol_reference_markdown

    text = protocol_reference_markdown() if format is RefFormat.markdown else protocol_json_schema_text()
    if out is None:
        _echo(text, nl=False)
    else:
        atomic_write_text(out, text)
        _err(f"wrote {out}")


# -------------------------------------------------------------------- demo
@app.command()
@_guarded
def demo(
    out: str = typer.Option("guardband-demo", "--out", "-o", callback=_nonempty_out,
                            help="Folder for everything the demo writes."),
) -> None:
    """Run check, plan, verify and replay on the bundled tablet-blend protocol."""
    from guardband.planner.app.demo import run_demo

    lines = run_demo(Path(out), echo=_show)
    for line in lines:
        _err(line)


#: Pydantic looks for plugins in the entry points of every installed distribution when it
#: builds its first model (5 to 10 ms on the project's machine, more with many distributions
#: installed or a cold file cache); the command line uses none.
#: Documented by pydantic; a value the user set is kept. Library use (``import guardband``) is
#: left alone.
NO_PYDANTIC_PLUGINS = ("PYDANTIC_DISABLE_PLUGINS", "__all__")


def main() -> None:
    """Console entry point. An unexpected failure prints one line, not a traceback."""
    os.environ.setdefault(*NO_PYDANTIC_PLUGINS)
    try:
        app()
    except Exception as exc:
        if os.environ.get("GUARDBAND_DEBUG"):
            raise
        _err(f"Internal error: {type(exc).__name__}: {exc}. "
             "Set GUARDBAND_DEBUG=1 to see the traceback, and please report it.")
        sys.exit(1)


if __name__ == "__main__":  # pragma: no cover
    main()
