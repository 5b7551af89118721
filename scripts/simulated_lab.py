"""A simulated lab: "measure" the runs in progress of a runs file under a scenario's truth.

For trying Guardband (the README's worked campaign) without a lab. It reads
a runs file with Guardband's runs reader, optionally appends the proposals
of the last plan recorded in a campaign folder as runs in progress, gives
every run in progress the values of one named scenario of a scenario file
(its formula truth plus its measurement noise; a binomial limit as a count
out of the scenario's cohort, exactly as ``guardband simulate`` measures),
and writes the whole table as a new runs file::

    python scripts/simulated_lab.py PROTOCOL SCENARIOS --scenario NAME \\
        --runs RUNS.csv [--campaign FOLDER] --out NEW_RUNS.csv [--seed N] [--noise-scale S]

The truths of the example scenario files are invented; numbers made this
way say nothing about any real product or dose. Exit codes are Guardband's
(3 a bad protocol or scenario file, 4 a bad runs file, 5 a campaign whose
decision log fails verification, 8 an output that cannot be written).
"""

from __future__ import annotations

import argparse
import csv
import io
import sys
from pathlib import Path

import numpy as np

from guardband.planner import settings
from guardband.planner.app.fileio import atomic_write_text, read_regular_file, write_csv_text
from guardband.planner.errors import GuardbandError, ProtocolError
from guardband.planner.inputs.protocol import Protocol, load_protocol
from guardband.planner.inputs.reading import read_toml
from guardband.planner.inputs.runs import NOTES, RUN_ID, RunsTable, read_runs
from guardband.planner.simulation.scenarios import parse_scenarios


def scenario_problem(protocol: Protocol, path: Path, name: str):
    """The :class:`Problem` of one named formula scenario of a scenario file (only that one is built)."""
    data = read_toml(path, what="scenario", error=ProtocolError, max_bytes=settings.MAX_PROTOCOL_BYTES,
                     max_nesting=settings.MAX_PROTOCOL_NESTING)
    entries = [e for e in data.get("scenario", []) if isinstance(e, dict) and e.get("name") == name]
    if not entries:
        known = [e.get("name") for e in data.get("scenario", []) if isinstance(e, dict)]
        raise ProtocolError(f"{path.name}: no scenario named {name!r} (the file has {known})")
    if "draw_from_runs" in entries[0]:
        raise ProtocolError(f"{path.name}: scenario {name!r} draws its truth per campaign; the simulated "
                            "lab needs a scenario with formulas")
    found = parse_scenarios({**data, "scenario": entries}, protocol, source=path.name, folder=path.parent)
    return found.scenarios[0].problem


def last_plan_rows(protocol: Protocol, folder: Path) -> list[tuple[str, list[float]]]:
    """The proposals (run id, factor values) of the last plan recorded in a campaign folder."""
    from guardband.planner.app.audit import verify_campaign
    from guardband.planner.app.workflow import LOG_NAME
    from guardband.planner.errors import VerificationError
    from guardband.safety import ledger

    log = folder / LOG_NAME
    verdict = verify_campaign(log)
    if not verdict.ok:
        raise VerificationError(f"{log} failed verification: {verdict.problem}")
    plans = [r for r in ledger.read_records(log) if r["kind"] == "plan"]
    if not plans:
        raise VerificationError(f"{log}: the log holds no plan record")
    table = plans[-1]["body"]["plan_table"]["file"]
    text = read_regular_file(folder / table, max_bytes=settings.CAMPAIGN_FILE_MAX_BYTES).decode("utf-8")
    return [(row[RUN_ID], [float(row[f]) for f in protocol.factor_names])
            for row in csv.DictReader(io.StringIO(text))]


def measure_pending(protocol: Protocol, runs: RunsTable, extra, problem, rng, *,
                    noise_scale: float = 1.0) -> tuple[list[str], list[list], int]:
    """The runs table as rows with its runs in progress (and ``extra`` runs) measured under ``problem``.

    ``noise_scale`` multiplies the scenario's noise; at 0 a run gets the truth
    itself (a binomial response's events then the true rate times the cohort, rounded).

    Returns
    -------
    header, rows, n_measured
    """
    known = set(runs.run_ids)
    extra = [(rid, x) for rid, x in extra if rid not in known]  # appended in an earlier round already
    ids = list(runs.run_ids) + [rid for rid, _ in extra]
    X = np.vstack([runs.X, np.array([x for _, x in extra], dtype=float).reshape(-1, runs.X.shape[1])])
    notes = list(runs.notes) + ["" for _ in extra]
    todo = np.concatenate([runs.pending, np.ones(len(extra), dtype=bool)])
    values = {c: np.concatenate([_column(protocol, runs, c), np.full(len(extra), np.nan)])
              for c in protocol.runs_columns}
    if todo.any():
        got = problem.measure(problem.evaluate(X[todo]), rng, scale=noise_scale)
        for r in protocol.response_names:
            lim = next((item for item in protocol.binomial_responses if item.name == r), None)
            if lim is None:
                values[r][todo] = got[r]
                continue
            m = problem.cohort.get(r)
            if not m:
                raise ProtocolError(f"scenario {problem.name!r}: a binomial response needs [scenario.cohort] "
                                    f"{r} = the subjects per cohort")
            values[lim.events][todo] = np.rint(np.asarray(got[r]) * m)
            values[lim.subjects][todo] = m
        for i in np.flatnonzero(todo):
            notes[i] = "; ".join(n for n in (notes[i], f"simulated lab, scenario {problem.name}") if n)
    header = [RUN_ID, *protocol.factor_names, *protocol.runs_columns, NOTES]
    rows = [[rid, *[float(v) for v in X[i]],
             *[float(values[c][i]) if np.isfinite(values[c][i]) else None for c in protocol.runs_columns],
             notes[i]] for i, rid in enumerate(ids)]
    return header, rows, int(todo.sum())


def _column(protocol: Protocol, runs: RunsTable, column: str) -> np.ndarray:
    """A runs-file column as read: a response, or a binomial response's events or subjects."""
    for lim in protocol.binomial_responses:
        if column in (lim.events, lim.subjects):
            events, subjects = runs.counts[lim.name]
            return np.asarray(events if column == lim.events else subjects, dtype=float).copy()
    return np.asarray(runs.Y[column], dtype=float).copy()


def main(argv: list[str] | None = None) -> int:
    """Run the simulated lab; return the exit code."""
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("protocol", type=Path)
    parser.add_argument("scenarios", type=Path, help="scenario file (TOML)")
    parser.add_argument("--scenario", required=True, help="name of a formula scenario in the file")
    parser.add_argument("--runs", required=True, type=Path, help="the runs file so far")
    parser.add_argument("--campaign", type=Path, help="also measure the last plan recorded in this folder")
    parser.add_argument("--out", required=True, type=Path, help="the new runs file")
    parser.add_argument("--seed", type=int, default=0, help="seed of the measurement noise")
    parser.add_argument("--noise-scale", type=float, default=1.0,
                        help="multiplies the scenario's noise (0: the truth itself)")
    args = parser.parse_args(argv)
    try:
        protocol = load_protocol(args.protocol)
        problem = scenario_problem(protocol, args.scenarios, args.scenario)
        runs = read_runs(args.runs, protocol)
        extra = last_plan_rows(protocol, args.campaign) if args.campaign else []
        if not args.noise_scale >= 0:
            parser.error("--noise-scale must be 0 or more")
        header, rows, measured = measure_pending(protocol, runs, extra, problem,
                                                 np.random.default_rng(args.seed), noise_scale=args.noise_scale)
        atomic_write_text(args.out, write_csv_text(rows, header, float_format=".6g"))
    except GuardbandError as exc:
        print(f"Error: {exc}", file=sys.stderr)
        return exc.exit_code
    print(f"wrote {args.out}: {len(rows)} runs, {measured} measured by the simulated lab "
          f"(scenario {args.scenario}; invented truth)", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
