"""Batches at equal run counts: how far from the optimum, and how many limit breaks, per batch method.

For every problem (the built-in ones with their stated measurement noise,
and the first N of the generated family) and every seed, this runs one
campaign of the same number of planned runs for each batch size and each
batch method (``[batch] method``), at one screen threshold. One run per
step is the same under every method, so batch size 1 runs once and is the
yardstick. Every campaign of one problem and seed starts from the same runs.

Two figures per campaign (as in ``frontier.py``):

* breaks: planned runs whose TRUE (noise-free) responses broke a limit;
* gap: the best TRUE objective among the campaign's runs that truly met
  every limit, from the true constrained optimum, in % of the objective's
  range (positive is worse; infinite when no run truly met every limit).

Per problem group (each built-in problem, the family): per batch size and
method, the share of planned runs that broke a limit (pooled, exact 95%
interval), the median gap and its ratio to one run per step, and stalled
campaigns. A plain method name sets ``batch.method`` only (the other
settings keep their defaults, ``batch.search_per_run`` among them);
``--variants`` names settings of any table (``name:section.key=value,...``),
e.g. ``today:batch.method=believer,batch.search_per_run=false`` or
``no-span:screen.span_reach=none``, and ``--methods`` then lists the names;
``--one-variant NAME`` gives one run per step that variant's settings too
(for settings that are not about batches, such as a model's).
The README's table: ``--family 56 --seeds 2 --budget 24 --batches 1 4 8
--methods today sampled-only new --variants ...`` (the README gives it whole).

Outputs: ``--out`` (summary) and ``<stem>_campaigns.csv`` (one row per
campaign; rows of other ``--label`` values are kept).

Run:  python benchmarks/batches.py [--builtin gramacy tablet dose coating] [--family 28]
          [--seeds 2] [--family-seeds 1] [--budget 24] [--batches 1 4 8]
          [--methods believer sampled] [--threshold 0.95] [--pool 1000] [--refine 1]
          [--workers 2] [--label current] [--out benchmarks/results/batches.csv]
      python benchmarks/batches.py --quick     # a few minutes
"""

from __future__ import annotations

import argparse
import copy
import dataclasses
import math
import os
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import calibration as cal  # noqa: E402  (CSV merging, the exact interval, the family jobs)
import frontier as fr  # noqa: E402  (one campaign's breaks and true gap)

from guardband.planner.app.fileio import atomic_write_text, write_csv_text  # noqa: E402
from guardband.planner.simulation.family import with_settings  # noqa: E402
from guardband.planner.simulation.problems import Problem, get_problem, objective_range  # noqa: E402
from guardband.planner.simulation.runner import run_in_workers  # noqa: E402

DEFAULTS = {"builtin": ["gramacy", "tablet", "dose", "coating"], "family": 28, "seeds": 2, "family_seeds": 1,
            "budget": 24, "batches": [1, 4, 8], "methods": ["believer", "sampled"], "threshold": 0.95,
            "pool": 1000, "refine": 1}
QUICK = {"builtin": ["gramacy"], "family": 4, "seeds": 1, "family_seeds": 1, "budget": 8, "batches": [1, 4],
         "methods": ["believer", "sampled"], "threshold": 0.95, "pool": 300, "refine": 0}
CAMPAIGN_COLUMNS = ("label", "problem", "group", "shape", "batch", "method", "seed", "planned", "broken",
                    "gap_pct", "stalled", "wall_s")
SUMMARY_COLUMNS = ("label", "group", "batch", "method", "campaigns", "planned", "broken", "broken_share",
                   "ci_low", "ci_high", "median_gap_pct", "gap_ratio", "stalled")


def parse_variant(text: str) -> tuple[str, dict]:
    """``name:section.key=value,...`` -> (name, {section: {key: value}}); ``none`` is None."""
    name, _, body = text.partition(":")
    if not name or not body:
        raise SystemExit(f"variant {text!r}: expected name:section.key=value[,section.key=value]")
    out: dict = {}
    for item in body.split(","):
        key, _, raw = item.partition("=")
        section, _, field = key.partition(".")
        if not section or not field or not raw:
            raise SystemExit(f"variant {text!r}: {item!r} is not section.key=value")
        value: object = raw
        if raw.lower() == "none":
            value = None
        elif raw.lower() in ("true", "false"):
            value = raw.lower() == "true"
        else:
            for kind in (int, float):
                try:
                    value = kind(raw)
                    break
                except ValueError:
                    pass
        out.setdefault(section, {})[field] = value
    return name, out


def with_overrides(problem: Problem, overrides: dict) -> Problem:
    """The problem with ``{section: {key: value}}`` replaced in its protocol."""
    data = copy.deepcopy(problem.protocol_dict)
    for section, values in overrides.items():
        data[section] = {**data.get(section, {}), **values}
    return dataclasses.replace(problem, protocol_dict=data)


def _jobs(problems, opt: dict, variants: dict, one_variant: str | None = None) -> list:
    """Every (problem, batch, method, seed) campaign; batch 1 once (every method plans it alike),
    with the settings of the variant ``one_variant`` when it is named."""
    jobs = []
    for problem, group, seeds in problems:
        rng_ = objective_range(problem)
        for batch in opt["batches"]:
            for method in (["any"] if batch == 1 else opt["methods"]):
                p = with_settings(problem, threshold=opt["threshold"], batch=batch, pool=opt["pool"],
                                  refine=opt["refine"])
                if method in variants:
                    p = with_overrides(p, variants[method])
                elif batch == 1 and one_variant is not None:
                    p = with_overrides(p, variants[one_variant])
                elif method != "any":
                    p = with_overrides(p, {"batch": {"method": method}})
                jobs += [fr.Job(p, group, f"{batch}|{method}", "protocol", opt["threshold"], "", s,
                                opt["budget"], rng_) for s in range(seeds)]
    return jobs


def run_job(job) -> dict:
    """One campaign's breaks and gap, with its batch size and method."""
    out = fr.run_job(job)
    batch, method = out.pop("strategy").split("|")
    return {**out, "batch": int(batch), "method": method}


def summarize(campaigns: list[dict], label: str) -> list[dict]:
    """One row per group, batch size and method; the gap ratio is against one run per step."""
    groups = [(g, [c for c in campaigns if c["group"] == g]) for g in dict.fromkeys(c["group"] for c in campaigns)]
    rows = []
    for group, cs in groups:
        one = [float(c["gap_pct"]) for c in cs if int(c["batch"]) == 1]
        base = float(np.median(one)) if one else math.nan
        for batch, method in dict.fromkeys((int(c["batch"]), str(c["method"])) for c in cs):
            sel = [c for c in cs if int(c["batch"]) == batch and str(c["method"]) == method]
            planned, broken = sum(int(c["planned"]) for c in sel), sum(int(c["broken"]) for c in sel)
            lo, hi = cal.clopper_pearson(broken, planned)
            med = float(np.median([float(c["gap_pct"]) for c in sel]))
            rows.append({"label": label, "group": group, "batch": batch, "method": method, "campaigns": len(sel),
                         "planned": planned, "broken": broken,
                         "broken_share": broken / planned if planned else math.nan, "ci_low": lo, "ci_high": hi,
                         "median_gap_pct": med,
                         "gap_ratio": med / base if base > 0 and math.isfinite(med) else math.nan,
                         "stalled": sum(str(c["stalled"]) in ("True", "1", "1.0") for c in sel)})
    return rows


def markdown(summary: list[dict], command: str, wall: float) -> str:
    lines = [f"Reproduce: `{command}`", "",
             "| group | batch | method | campaigns | broke a limit [95% CI] | median gap % | x one at a time | stalled |",
             "|---|---:|---|---:|---|---:|---:|---:|"]
    for r in summary:
        ratio = "-" if not math.isfinite(float(r["gap_ratio"])) else f"{float(r['gap_ratio']):.2f}"
        lines.append(f"| {r['group']} | {r['batch']} | {r['method']} | {r['campaigns']} | "
                     f"{fr._pct(r['broken_share'])} [{fr._pct(r['ci_low'])}, {fr._pct(r['ci_high'])}] "
                     f"({r['broken']}/{r['planned']}) | {fr._gap(r['median_gap_pct'])} | {ratio} | {r['stalled']} |")
    lines += ["", f"Wall time {wall:.0f} s on {os.cpu_count()} CPU(s)."]
    return "\n".join(lines)


def _command(args, opt: dict) -> str:
    lst = lambda v: " ".join(str(x) for x in v)  # noqa: E731
    return (f"python benchmarks/batches.py --builtin {lst(opt['builtin'])} --family {opt['family']} "
            f"--seeds {opt['seeds']} --family-seeds {opt['family_seeds']} --budget {opt['budget']} "
            f"--batches {lst(opt['batches'])} --methods {lst(opt['methods'])} --threshold {opt['threshold']:g} "
            + (f"--variants {lst(args.variants)} " if args.variants else "")
            + (f"--one-variant {args.one_variant} " if args.one_variant else "")
            + f"--pool {opt['pool']} --refine {opt['refine']} --workers {args.workers} --label {args.label}")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--builtin", nargs="*", help="built-in problems (default all four)")
    ap.add_argument("--family", type=int, help="first N problems of the generated family (default 28)")
    ap.add_argument("--family-seed", type=int, default=0)
    ap.add_argument("--seeds", type=int, help="campaigns per built-in problem, batch size and method")
    ap.add_argument("--family-seeds", type=int, help="campaigns per family problem (default 1)")
    ap.add_argument("--budget", type=int, help="planned runs per campaign (default 24: whole batches of 1, 4, 8)")
    ap.add_argument("--batches", type=int, nargs="*", help="batch sizes (default 1 4 8)")
    ap.add_argument("--methods", nargs="*", help="batch methods, or names of --variants")
    ap.add_argument("--variants", nargs="*", default=[], help="name:section.key=value,... (diagnosis)")
    ap.add_argument("--one-variant", help="a name of --variants whose settings one run per step takes too")
    ap.add_argument("--threshold", type=float)
    ap.add_argument("--pool", type=int)
    ap.add_argument("--refine", type=int)
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--workers", type=int, default=min(2, os.cpu_count() or 1))
    ap.add_argument("--label", default="current")
    ap.add_argument("--out", type=Path, default=Path("benchmarks/results/batches.csv"))
    args = ap.parse_args(argv)
    base = QUICK if args.quick else DEFAULTS
    opt = {k: getattr(args, k) if getattr(args, k) is not None else v for k, v in base.items()}
    variants = dict(parse_variant(v) for v in args.variants)
    began = time.perf_counter()
    problems = [(get_problem(n), n, opt["seeds"]) for n in opt["builtin"]]
    family = run_in_workers(cal._family_job, [(i, args.family_seed) for i in range(opt["family"])],
                            workers=args.workers)
    problems += [(p, "family", opt["family_seeds"]) for p in family]
    if args.one_variant is not None and args.one_variant not in variants:
        raise SystemExit(f"--one-variant {args.one_variant!r} is not a name of --variants")
    jobs = _jobs(problems, opt, variants, args.one_variant)

    def progress(done, total):
        if sys.stderr.isatty() or done == total or done % 20 == 0:
            print(f"\r{done}/{total} campaigns, {time.perf_counter() - began:.0f} s", end="", file=sys.stderr)

    campaigns = [{**c, "label": args.label} for c in run_in_workers(run_job, jobs, workers=args.workers,
                                                                     progress=progress)]
    print(file=sys.stderr)
    wall = time.perf_counter() - began
    camp_path = args.out.with_name(args.out.stem + "_campaigns.csv")
    all_campaigns = cal._merge(camp_path, campaigns, args.label)
    summary = [row for lab in dict.fromkeys(str(c["label"]) for c in all_campaigns)
               for row in summarize([c for c in all_campaigns if str(c["label"]) == lab], lab)]
    command = _command(args, opt)
    print(markdown([r for r in summary if r["label"] == args.label], command, wall))
    comments = [c for c in cal._comments(args.out) if not c.startswith(f"[{args.label}] ")] + [
        f"[{args.label}] {command}", f"[{args.label}] wall time {wall:.0f} s on {os.cpu_count()} CPU(s)",
        "gap: best TRUE objective among runs that truly met every limit, from the optimum, % of range"]
    args.out.parent.mkdir(parents=True, exist_ok=True)
    atomic_write_text(camp_path, write_csv_text([{k: c.get(k) for k in CAMPAIGN_COLUMNS} for c in all_campaigns],
                                                CAMPAIGN_COLUMNS, comment_lines=comments, float_format=".6g"))
    atomic_write_text(args.out, write_csv_text(summary, SUMMARY_COLUMNS, comment_lines=comments,
                                               float_format=".6g"))
    print(f"\nwrote {args.out} and {camp_path}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
