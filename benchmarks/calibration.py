"""Calibration of the safety screen on the generated problem family.

The screen promises that a proposal passing at threshold t meets every
limit at least about t of the time. This runs simulated campaigns on the
generated family (:mod:`planner.simulation.family`), one run per step and
in batches, at several thresholds, and records for every planned run the
joint figure the screen promised and whether the run met every limit by
its TRUE (noise-free) values. It reports the share that broke a limit with
its exact binomial 95% interval (Clopper & Pearson 1934, Biometrika
26:404-413; ``guardband.safety.calibration.clopper_pearson``),
overall and per shape class, dimension, domain, noise level and
``judged_on``; the median gap to the optimum as a share of the objective's
range (the gap of quality.py: the true objective at the run the lab would
pick, the best measured among runs measured within every limit, minus the
known optimum, positive is worse); and a reliability plot (promised against
observed share meeting every limit, binned).

A problem counts in a shape-class group when any of its limits has that
class. "Broken as judged" judges each limit as its protocol says (the next
measurement, or the true value); the headline judges every limit on the
true value.

Outputs: ``--out`` (summary, one row per label, batch, threshold and
group), ``<out stem>_runs.csv`` (one row per planned run),
``<out stem>_campaigns.csv`` (one row per campaign: gap, stalled and why)
and ``<out stem>.png``. Rows of other ``--label`` values already in those files are
kept, so two configurations (before and after a change) sit side by side.

Run:  python benchmarks/calibration.py [--problems 112] [--seeds 1] [--batch 1 4]
          [--thresholds 0.8 0.9 0.95] [--pool 1000] [--refine 1] [--budget 20]
          [--workers 2] [--label current] [--out benchmarks/results/calibration.csv]
      python benchmarks/calibration.py --quick        # a few minutes at most
      python benchmarks/calibration.py --indices 5 19 --seeds 4 --batch 4   # reproducers
"""

from __future__ import annotations

import argparse
import csv
import math
import os
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np


from guardband.planner.app.fileio import atomic_write_text, write_csv_text  # noqa: E402
from guardband.planner.simulation.family import family_problem, with_settings  # noqa: E402
from guardband.planner.simulation.problems import Problem  # noqa: E402
from guardband.planner.simulation.runner import run_in_workers, simulate  # noqa: E402
from guardband.safety.calibration import clopper_pearson as _clopper_pearson  # noqa: E402
from guardband.safety.limits import within_limit  # noqa: E402

#: Defaults of a full run: about 40 minutes on 2 cores (see the README).
DEFAULTS = {"problems": 112, "seeds": 1, "batch": [1, 4], "thresholds": [0.8, 0.9, 0.95],
            "pool": 1000, "refine": 1, "budget": 20}
#: --quick: one problem per shape class, short campaigns, small pools.
QUICK = {"problems": 7, "seeds": 1, "batch": [1, 4], "thresholds": [0.95], "pool": 300,
         "refine": 0, "budget": 8}
#: Tags by which the summary groups planned runs.
GROUPS = ("shape", "dimension", "domain", "noise", "judged_on", "sd_stated", "n_limits", "depends", "start")
#: Tags copied to every per-run row.
RUN_TAGS = ("shape", "shapes", "dimension", "domain", "noise", "judged_on", "sd_stated", "depends",
            "n_limits", "start")
#: Bins of the promised joint figure in the reliability plot.
PLOT_BINS = (0.0, 0.8, 0.85, 0.9, 0.95, 0.975, 0.99, 1.0 + 1e-12)
CONFIDENCE = 0.95

RUN_COLUMNS = ("label", "index", "problem", *RUN_TAGS, "batch", "threshold", "seed", "run", "step",
               "promised", "met_true", "met_as_judged", "stalled")
CAMPAIGN_COLUMNS = ("label", "index", "problem", "batch", "threshold", "seed", "planned", "broken",
                    "gap_pct", "stalled", "message", "wall_s")
SUMMARY_COLUMNS = ("label", "batch", "threshold", "group", "value", "campaigns", "runs", "broken",
                   "broken_share", "ci_low", "ci_high", "broken_as_judged_share", "mean_promised",
                   "median_gap_pct", "stalled", "wall_s")


@dataclass(frozen=True)
class Job:
    """One campaign: a problem (with its settings), a seed and what to label it with."""

    index: int
    problem: Problem
    batch: int
    threshold: float
    seed: int
    budget: int


def run_job(job: Job) -> dict:
    """Run one campaign; its per-run rows and its gap (share of the objective's range, in %)."""
    began = time.perf_counter()
    result = simulate(job.problem, None, budget=job.budget, seeds=1, strategies=("protocol",),
                      noise_scale=1.0, workers=1, seed=job.seed)
    h = result.histories["protocol"][0]
    protocol = result.protocol
    idx = np.flatnonzero(h.planned)
    met_true = ~h.broke_limit[idx]
    judged = np.ones(idx.size, dtype=bool)
    for lim in protocol.limits:
        values = h.T if lim.judged_on == "true-value" else h.Y
        judged &= within_limit(np.asarray(values[lim.name], float)[idx], lim)
    gap = float(result.trajectories("protocol")["gap_true"][0, -1])
    tags = job.problem.tags
    rows = [{"index": job.index, "problem": job.problem.name, **{k: tags[k] for k in RUN_TAGS},
             "batch": job.batch, "threshold": job.threshold, "seed": job.seed, "run": k + 1,
             "step": k // job.batch + 1, "promised": float(h.promised[i]), "met_true": bool(met_true[k]),
             "met_as_judged": bool(judged[k]), "stalled": bool(h.stalled)}
            for k, i in enumerate(idx)]
    return {"index": job.index, "problem": job.problem.name, "batch": job.batch,
            "threshold": job.threshold, "seed": job.seed, "rows": rows, "planned": len(rows),
            "broken": int(sum(not r["met_true"] for r in rows)),
            "gap_pct": 100.0 * gap / tags["objective_range"], "stalled": bool(h.stalled),
            "message": h.message, "tags": dict(tags), "wall_s": time.perf_counter() - began}


def _family_job(args: tuple[int, int]) -> Problem:
    return family_problem(*args)


# ------------------------------------------------------------- summary
def clopper_pearson(k: int, n: int) -> tuple[float, float]:
    """Exact binomial 95% interval of k successes out of n (Clopper & Pearson 1934); NaN for n = 0."""
    return _clopper_pearson(k, n, CONFIDENCE)


def _group_values(tags: dict, group: str) -> list:
    if group == "shape":  # every class among the problem's limits
        return sorted(set(str(tags["shapes"]).split("+")))
    if group == "depends":  # what any of its limits depends on
        return sorted(set(str(tags["depends"]).split("+")))
    return [tags[group]]


def summarize(campaigns: list[dict], label: str) -> list[dict]:
    """Summary rows: every (batch, threshold), overall and per group value."""
    out = []
    for batch, threshold in sorted({(c["batch"], c["threshold"]) for c in campaigns}):
        chosen = [c for c in campaigns if (c["batch"], c["threshold"]) == (batch, threshold)]
        groups = [("all", "all", chosen)]
        for g in GROUPS:
            values = sorted({v for c in chosen for v in _group_values(c["tags"], g)}, key=str)
            groups += [(g, v, [c for c in chosen if v in _group_values(c["tags"], g)]) for v in values]
        for group, value, cs in groups:
            rows = [r for c in cs for r in c["rows"]]
            n, broken = len(rows), sum(not r["met_true"] for r in rows)
            lo, hi = clopper_pearson(broken, n)
            gaps = [c["gap_pct"] for c in cs]
            out.append({
                "label": label, "batch": batch, "threshold": threshold, "group": group, "value": value,
                "campaigns": len(cs), "runs": n, "broken": broken,
                "broken_share": broken / n if n else float("nan"), "ci_low": lo, "ci_high": hi,
                "broken_as_judged_share": (sum(not r["met_as_judged"] for r in rows) / n) if n else float("nan"),
                "mean_promised": float(np.mean([r["promised"] for r in rows])) if n else float("nan"),
                "median_gap_pct": float(np.median(gaps)) if gaps else float("nan"),
                "stalled": sum(c["stalled"] for c in cs),
                "wall_s": round(sum(c["wall_s"] for c in cs), 1),
            })
    return out


def _pct(v) -> str:
    return "-" if v is None or not math.isfinite(float(v)) else f"{100 * float(v):.1f}%"


def _cell(r: dict) -> str:
    return f"{_pct(r['broken_share'])} [{_pct(r['ci_low'])}, {_pct(r['ci_high'])}] ({r['broken']}/{r['runs']})"


def markdown(summary: list[dict], command: str, wall: float, others: dict) -> str:
    """The overall table, one table per group, and other labels' overall rows."""
    configs = sorted({(r["batch"], r["threshold"]) for r in summary})
    lines = [f"Reproduce: `{command}`", "",
             "| label | batch | threshold | campaigns | planned runs | broke a limit (true values) [95% CI] | "
             "broke, as judged | mean promised | median gap (% of range) | stalled |",
             "|---|---:|---:|---:|---:|---|---:|---:|---:|---:|"]
    overall = [r for r in summary if r["group"] == "all"]
    for r in overall + [r for rows in others.values() for r in rows]:
        lines.append(f"| {r['label']} | {r['batch']} | {float(r['threshold']):g} | {r['campaigns']} | {r['runs']} | "
                     f"{_cell(r)} | {_pct(r['broken_as_judged_share'])} | {float(r['mean_promised']):.3f} | "
                     f"{float(r['median_gap_pct']):.2f} | {r['stalled']} |")
    for g in GROUPS:
        values = sorted({r["value"] for r in summary if r["group"] == g}, key=str)
        lines += ["", f"Broke a limit by {g} (share [95% CI] (broken/runs)):", "",
                  f"| {g} | " + " | ".join(f"batch {b}, t={t:g}" for b, t in configs) + " |",
                  "|---|" + "---|" * len(configs)]
        for v in values:
            cells = [next((_cell(r) for r in summary if r["group"] == g and r["value"] == v
                           and (r["batch"], r["threshold"]) == c), "-") for c in configs]
            lines.append(f"| {v} | " + " | ".join(cells) + " |")
    lines += ["", f"Wall time {wall:.0f} s on {os.cpu_count()} CPU(s)."]
    return "\n".join(lines)


# ------------------------------------------------------------- outputs
def _read_rows(path: Path) -> list[dict]:
    """Rows of a CSV written by this script (comment lines skipped); numbers as floats."""
    if not path.exists():
        return []
    with path.open(newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(line for line in fh if not line.startswith("#"))
        rows = []
        for row in reader:
            for k, v in row.items():
                for kind in (int, float):
                    try:
                        row[k] = kind(v)
                        break
                    except (TypeError, ValueError):
                        pass
            rows.append(row)
    return rows


def _comments(path: Path) -> list[str]:
    """Comment lines of a CSV written by this script (without the leading '# ')."""
    if not path.exists():
        return []
    with path.open(encoding="utf-8") as fh:
        return [line[2:].rstrip("\n") for line in fh if line.startswith("# ")]


def _merge(path: Path, rows: list[dict], label: str) -> list[dict]:
    """This run's rows after the rows of other labels already in ``path``."""
    return [r for r in _read_rows(path) if str(r.get("label")) != label] + rows


def reliability_plot(runs: list[dict], path: Path) -> None:
    """Promised joint figure against observed share meeting every limit, binned, per label and batch."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(6.4, 5.6))
    bottom = 0.5
    ax.plot([0.75, 1.0], [0.75, 1.0], color="0.6", lw=1, ls="--", label="promise kept")
    keys = sorted({(str(r["label"]), int(float(r["batch"]))) for r in runs})
    for n, (label, batch) in enumerate(keys):
        sel = [r for r in runs if str(r["label"]) == label and int(float(r["batch"])) == batch]
        p = np.array([float(r["promised"]) for r in sel])
        met = np.array([str(r["met_true"]) in ("True", "1.0", "1") for r in sel])
        xs, ys, lo, hi = [], [], [], []
        for a, b in zip(PLOT_BINS[:-1], PLOT_BINS[1:]):
            m = (p >= a) & (p < b)
            if m.sum() < 5:
                continue
            ci = clopper_pearson(int(met[m].sum()), int(m.sum()))
            xs.append(p[m].mean()), ys.append(met[m].mean()), lo.append(ci[0]), hi.append(ci[1])
        ys_a = np.array(ys)
        bottom = min([bottom] + [v - 0.02 for v in lo])
        ax.errorbar(np.array(xs) + 0.002 * n, ys_a, yerr=[ys_a - np.array(lo), np.array(hi) - ys_a],
                    marker="os^D"[n % 4], capsize=3, lw=1, label=f"{label}, batch {batch}")
    ax.set_xlabel("promised joint figure (bin mean)")
    ax.set_ylabel("observed share meeting every limit (true values)")
    ax.set_xlim(0.75, 1.005)
    ax.set_ylim(bottom, 1.005)
    ax.set_title("Screen calibration on the generated family\n(bins of >= 5 runs; 95% Clopper-Pearson)")
    ax.legend(loc="lower right", fontsize=8)
    ax.grid(alpha=0.3)
    fig.tight_layout()
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=120)
    plt.close(fig)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--problems", type=int, help=f"first N problems of the family (default {DEFAULTS['problems']})")
    ap.add_argument("--indices", type=int, nargs="*", help="these problem indices instead of the first N")
    ap.add_argument("--family-seed", type=int, default=0)
    ap.add_argument("--seeds", type=int, help="campaigns per problem and setting (default 1)")
    ap.add_argument("--batch", type=int, nargs="*", help="batch sizes (default 1 4; 8 is an option)")
    ap.add_argument("--thresholds", type=float, nargs="*", help="default 0.8 0.9 0.95")
    ap.add_argument("--pool", type=int, help=f"candidate pool per step (default {DEFAULTS['pool']})")
    ap.add_argument("--refine", type=int, help=f"local refinements per step (default {DEFAULTS['refine']})")
    ap.add_argument("--budget", type=int, help=f"planned runs per campaign (default {DEFAULTS['budget']})")
    ap.add_argument("--quick", action="store_true", help="a tiny run (7 problems, short campaigns)")
    ap.add_argument("--workers", type=int, default=min(2, os.cpu_count() or 1))
    ap.add_argument("--label", default="current", help="names this configuration in every output")
    ap.add_argument("--out", type=Path, default=Path("benchmarks/results/calibration.csv"))
    args = ap.parse_args(argv)
    base = QUICK if args.quick else DEFAULTS
    opt = {k: getattr(args, k) if getattr(args, k) is not None else v for k, v in base.items()}
    indices = list(args.indices) if args.indices else list(range(opt["problems"]))
    command = ("python benchmarks/calibration.py " + ("--quick " if args.quick else "")
               + (f"--indices {' '.join(map(str, indices))} " if args.indices else f"--problems {len(indices)} ")
               + f"--family-seed {args.family_seed} --seeds {opt['seeds']} "
               f"--batch {' '.join(map(str, opt['batch']))} --thresholds {' '.join(f'{t:g}' for t in opt['thresholds'])} "
               f"--pool {opt['pool']} --refine {opt['refine']} --budget {opt['budget']} "
               f"--workers {args.workers} --label {args.label}")
    began = time.perf_counter()
    problems = run_in_workers(_family_job, [(i, args.family_seed) for i in indices], workers=args.workers)
    made = time.perf_counter() - began
    print(f"family: {len(problems)} problems in {made:.0f} s", file=sys.stderr)
    jobs = [Job(i, with_settings(p, threshold=t, batch=b, pool=opt["pool"], refine=opt["refine"]), b, t, s,
                opt["budget"])
            for i, p in zip(indices, problems) for b in opt["batch"] for t in opt["thresholds"]
            for s in range(opt["seeds"])]

    def progress(done, total):
        if sys.stderr.isatty() or done == total or done % 20 == 0:
            print(f"\r{done}/{total} campaigns, {time.perf_counter() - began:.0f} s", end="", file=sys.stderr)

    campaigns = run_in_workers(run_job, jobs, workers=args.workers, progress=progress)
    wall = time.perf_counter() - began
    print(file=sys.stderr)
    for c in campaigns:
        for r in c["rows"]:
            r["label"] = args.label
    summary = summarize(campaigns, args.label)
    runs = [r for c in campaigns for r in c["rows"]]
    runs_path = args.out.with_name(args.out.stem + "_runs.csv")
    campaigns_path = args.out.with_name(args.out.stem + "_campaigns.csv")
    all_summary = _merge(args.out, summary, args.label)
    all_runs = _merge(runs_path, runs, args.label)
    all_campaigns = _merge(campaigns_path, [{**c, "label": args.label} for c in campaigns], args.label)
    others: dict = {}
    for r in all_summary:
        if str(r["label"]) != args.label and r["group"] == "all":
            others.setdefault(str(r["label"]), []).append(r)
    print(markdown(summary, command, wall, others))
    comments = [f"[{args.label}] {line}" for line in (
        command, f"wall time {wall:.0f} s (family {made:.0f} s) on {os.cpu_count()} CPU(s)",
        "broken = a planned run whose TRUE responses broke some limit; CI: Clopper & Pearson (1934)")]
    comments = [c for c in _comments(args.out) if not c.startswith(f"[{args.label}] ")] + comments
    args.out.parent.mkdir(parents=True, exist_ok=True)
    atomic_write_text(args.out, write_csv_text(all_summary, SUMMARY_COLUMNS, comment_lines=comments,
                                               float_format=".6g"))
    atomic_write_text(runs_path, write_csv_text(all_runs, RUN_COLUMNS, comment_lines=comments, float_format=".6g"))
    atomic_write_text(campaigns_path, write_csv_text(
        [{k: c.get(k) for k in CAMPAIGN_COLUMNS} for c in all_campaigns], CAMPAIGN_COLUMNS,
        comment_lines=comments, float_format=".6g"))
    plot_path = args.out.with_suffix(".png")
    reliability_plot(all_runs, plot_path)
    print(f"\nwrote {args.out}, {runs_path}, {campaigns_path} and {plot_path}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
