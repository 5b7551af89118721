"""The gap-against-breaks frontier: Guardband at several thresholds against the textbook rule.

For every problem (the built-in ones, with their stated measurement noise,
and the first N of the generated family) and every seed, this runs one
campaign of one run per step for each of:

``t=0.5`` ... ``t=0.95``
    Guardband with the screen's threshold (and every limit's own
    probability) at t (:func:`planner.simulation.family.with_settings`);
``textbook``
    expected improvement times the product of the limits' probabilities,
    one GP per limit, no screen (:mod:`planner.simulation.strategies`);
``random``, ``classical``
    the peers of :mod:`planner.simulation.peers`;
``t=0.8 <ablation>``
    Guardband at the ablation threshold with one of its parts switched off
    (:data:`ABLATIONS`), to find where its efficiency goes.

Every campaign of one problem and seed starts from the same runs (the
classical route makes its own design). Two figures per campaign:

* breaks: planned runs whose TRUE (noise-free) responses broke a limit;
* gap: the best TRUE objective among the campaign's runs (starting runs
  included) that truly met every limit, from the true constrained optimum,
  in % of the objective's range over the design space (positive is worse;
  infinite when no run truly met every limit).

Per problem group (each built-in problem, the family's shape classes and
the family as a whole): each strategy's share of planned runs that broke a
limit (pooled), the median breaks per campaign and the median gap, and the
verdict of the target: at the best threshold whose break share is no
larger than the textbook rule's, is Guardband's median gap no larger? A
plot per group draws the frontier (gap against break share) with the
single points of the others.

Outputs: ``--out`` (summary), ``<stem>_campaigns.csv`` (one row per
campaign; rows of other ``--label`` values are kept, so runs can be added
in parts), ``<stem>.png`` (the plots).

Run:  python benchmarks/frontier.py [--builtin gramacy tablet dose coating] [--family 28]
          [--seeds 5] [--family-seeds 1] [--budget 30] [--family-budget 20] [--thresholds 0.5 0.7 0.8 0.9 0.95]
          [--peers textbook random classical] [--ablations ...] [--ablation-threshold 0.8]
          [--pool 1000] [--refine 1] [--workers 2] [--label current]
          [--out benchmarks/results/frontier.csv]
      python benchmarks/frontier.py --quick       # a few minutes
"""

from __future__ import annotations

import argparse
import copy
import dataclasses
import math
import os
import sys
import textwrap
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import calibration as cal  # noqa: E402  (one home for the CSV merging and the exact interval)

from guardband.planner.app.fileio import atomic_write_text, write_csv_text  # noqa: E402
from guardband.planner.simulation.family import family_problem, with_settings  # noqa: E402
from guardband.planner.simulation.problems import Problem, get_problem, objective_range  # noqa: E402
from guardband.planner.simulation.runner import run_in_workers, simulate  # noqa: E402

DEFAULTS = {"builtin": ["gramacy", "tablet", "dose", "coating"], "family": 28, "seeds": 5, "family_seeds": 1,
            "budget": 30,
            "family_budget": 20, "thresholds": [0.5, 0.7, 0.8, 0.9, 0.95],
            "peers": ["textbook", "random", "classical"], "ablations": [], "pool": 1000, "refine": 1}
QUICK = {"builtin": ["gramacy", "dose"], "family": 4, "seeds": 2, "family_seeds": 1, "budget": 10, "family_budget": 8,
         "thresholds": [0.5, 0.95], "peers": ["textbook", "random"], "ablations": [], "pool": 300, "refine": 0}
#: name -> what it switches off: {section: {key: value}} replaced in the protocol.
ABLATIONS = {
    "no-short": {"screen": {"short_model": False}},
    "no-loo-widen": {"screen": {"widen_from_loo": False}},
    "no-local-widen": {"screen": {"widen_locally": False}},
    "no-single-run": {"screen": {"single_run_check": False}},
    "no-span": {"screen": {"span_reach": None}},
    "no-step": {"screen": {"max_step": None}},
    "no-cap": {"model": {"limit_length_scale_max": 1000.0}},
    "no-weak-priors": {"model": {"ml_runs_per_hyperparameter": 0.0}},
    "pool-4000": {"batch": {"pool": 4000}},
    "no-guards": {"screen": {"short_model": False, "widen_from_loo": False, "widen_locally": False,
                             "single_run_check": False}},
}
CAMPAIGN_COLUMNS = ("label", "problem", "group", "shape", "strategy", "threshold", "ablation", "seed",
                    "planned", "broken", "gap_pct", "stalled", "wall_s")
SUMMARY_COLUMNS = ("label", "group", "strategy", "threshold", "ablation", "campaigns", "planned", "broken",
                   "broken_share", "ci_low", "ci_high", "median_breaks", "median_gap_pct", "q25_gap_pct",
                   "q75_gap_pct", "stalled")


@dataclass(frozen=True)
class Job:
    """One campaign: a problem (settings applied), a strategy and a seed."""

    problem: Problem
    group: str
    strategy: str  # the label in the tables: "t=0.8", "textbook", "t=0.8 no-span"
    run_as: str  # the simulator's strategy: "protocol" for Guardband
    threshold: float
    ablation: str
    seed: int
    budget: int
    objective_range: float


def with_ablation(problem: Problem, name: str) -> Problem:
    """The problem with the parts :data:`ABLATIONS` names switched off in its protocol."""
    data = copy.deepcopy(problem.protocol_dict)
    for section, values in ABLATIONS[name].items():
        data[section] = {**data.get(section, {}), **values}
    return dataclasses.replace(problem, protocol_dict=data)


def true_gap(history, protocol, optimum: float, among=None) -> float:
    """Best TRUE objective among runs (``among``, a mask; default all) that truly met every limit,
    from the optimum (inf: none did)."""
    y = np.asarray(history.T[protocol.objective.name], dtype=float)
    ok = ~history.broke_limit & np.isfinite(y)
    if among is not None:
        ok &= np.asarray(among, dtype=bool)
    if not np.any(ok):
        return math.inf
    best = float(np.max(y[ok]) if protocol.maximize else np.min(y[ok]))
    return (optimum - best) if protocol.maximize else (best - optimum)


def run_job(job: Job) -> dict:
    """One campaign's breaks and gap."""
    began = time.perf_counter()
    result = simulate(job.problem, None, budget=job.budget, seeds=1, strategies=(job.run_as,),
                      noise_scale=1.0, workers=1, seed=job.seed)
    h = result.histories[job.run_as][0]
    gap = true_gap(h, result.protocol, job.problem.optimum)
    return {"problem": job.problem.name, "group": job.group, "shape": job.problem.tags.get("shapes", job.group),
            "strategy": job.strategy, "threshold": job.threshold, "ablation": job.ablation, "seed": job.seed,
            "planned": int(h.planned.sum()), "broken": int(h.broke_limit[h.planned].sum()),
            "gap_pct": 100.0 * gap / job.objective_range, "stalled": bool(h.stalled),
            "wall_s": round(time.perf_counter() - began, 2)}


def _jobs(problems: list[tuple[Problem, str, int, int]], opt: dict) -> list[Job]:
    """Every (problem, strategy, seed) campaign of the run."""
    jobs = []
    for problem, group, budget, seeds in problems:
        rng_ = objective_range(problem)
        variants = [(f"t={t:g}", "protocol", t, "") for t in opt["thresholds"]]
        variants += [(peer, peer, math.nan, "") for peer in opt["peers"]]
        variants += [(f"t={opt['ablation_threshold']:g} {a}", "protocol", opt["ablation_threshold"], a)
                     for a in opt["ablations"]]
        for label, run_as, t, ablation in variants:
            p = with_settings(problem, threshold=t if run_as == "protocol" else 0.95, batch=1,
                              pool=opt["pool"], refine=opt["refine"])
            if ablation:
                p = with_ablation(p, ablation)
            jobs += [Job(p, group, label, run_as, t, ablation, s, budget, rng_) for s in range(seeds)]
    return jobs


# ------------------------------------------------------------- summary
def _groups(campaigns: list[dict]) -> list[tuple[str, list[dict]]]:
    """Each built-in problem, each family shape class, and the family as a whole."""
    out = [(g, [c for c in campaigns if c["group"] == g]) for g in dict.fromkeys(
        c["group"] for c in campaigns if c["group"] != "family")]
    fam = [c for c in campaigns if c["group"] == "family"]
    if fam:
        out.append(("family", fam))
        shapes = sorted({s for c in fam for s in str(c["shape"]).split("+")})
        out += [(f"family: {s}", [c for c in fam if s in str(c["shape"]).split("+")]) for s in shapes]
    return out


def summarize(campaigns: list[dict], label: str) -> list[dict]:
    """One row per group and strategy."""
    rows = []
    for group, cs in _groups(campaigns):
        for strategy in dict.fromkeys(c["strategy"] for c in cs):
            sel = [c for c in cs if c["strategy"] == strategy]
            planned, broken = sum(int(c["planned"]) for c in sel), sum(int(c["broken"]) for c in sel)
            lo, hi = cal.clopper_pearson(broken, planned)
            gaps = np.array([float(c["gap_pct"]) for c in sel])
            q25, med, q75 = np.percentile(gaps, [25, 50, 75], method="lower") if gaps.size else (math.nan,) * 3
            rows.append({"label": label, "group": group, "strategy": strategy, "threshold": sel[0]["threshold"],
                         "ablation": sel[0]["ablation"], "campaigns": len(sel), "planned": planned,
                         "broken": broken, "broken_share": broken / planned if planned else math.nan,
                         "ci_low": lo, "ci_high": hi,
                         "median_breaks": float(np.median([int(c["broken"]) for c in sel])),
                         "median_gap_pct": float(med), "q25_gap_pct": float(q25), "q75_gap_pct": float(q75),
                         "stalled": sum(str(c["stalled"]) in ("True", "1", "1.0") for c in sel)})
    return rows


def verdicts(summary: list[dict]) -> list[dict]:
    """Per group: the textbook rule's point, the best threshold whose break share is no larger, and
    whether Guardband's median gap there is no larger (the target)."""
    out = []
    for group in dict.fromkeys(r["group"] for r in summary):
        rows = [r for r in summary if r["group"] == group]
        tb = next((r for r in rows if r["strategy"] == "textbook"), None)
        ours = [r for r in rows if str(r["strategy"]).startswith("t=") and not r["ablation"]]
        if tb is None or not ours:
            continue
        eligible = [r for r in ours if r["broken_share"] <= tb["broken_share"]]
        best = min(eligible, key=lambda r: (r["median_gap_pct"], -float(r["threshold"])), default=None)
        out.append({"group": group, "textbook_share": tb["broken_share"], "textbook_gap": tb["median_gap_pct"],
                    "threshold": None if best is None else best["threshold"],
                    "share": None if best is None else best["broken_share"],
                    "gap": None if best is None else best["median_gap_pct"],
                    "met": best is not None and best["median_gap_pct"] <= tb["median_gap_pct"]})
    return out


def _pct(v, digits=1) -> str:
    return "-" if v is None or not math.isfinite(float(v)) else f"{100 * float(v):.{digits}f}%"


def _gap(v) -> str:
    return "-" if v is None else ("inf" if not math.isfinite(float(v)) else f"{float(v):.2f}")


def markdown(summary: list[dict], command: str, wall: float) -> str:
    """A table per group (break share, median breaks, median gap) and the verdicts."""
    lines = [f"Reproduce: `{command}`", ""]
    for group in dict.fromkeys(r["group"] for r in summary):
        lines += [f"**{group}**", "", "| strategy | campaigns | broke a limit [95% CI] | median breaks | "
                  "median gap % [q25, q75] | stalled |", "|---|---:|---|---:|---|---:|"]
        for r in (r for r in summary if r["group"] == group):
            lines.append(f"| {r['strategy']} | {r['campaigns']} | {_pct(r['broken_share'])} "
                         f"[{_pct(r['ci_low'])}, {_pct(r['ci_high'])}] | {float(r['median_breaks']):g} | "
                         f"{_gap(r['median_gap_pct'])} [{_gap(r['q25_gap_pct'])}, {_gap(r['q75_gap_pct'])}] | "
                         f"{r['stalled']} |")
        lines.append("")
    lines += ["| group | textbook: broke / gap % | best threshold with no more breaks | its breaks / gap % | "
              "target met |", "|---|---|---:|---|---|"]
    for v in verdicts(summary):
        lines.append(f"| {v['group']} | {_pct(v['textbook_share'])} / {_gap(v['textbook_gap'])} | "
                     f"{'-' if v['threshold'] is None else format(float(v['threshold']), 'g')} | "
                     f"{_pct(v['share'])} / {_gap(v['gap'])} | {'yes' if v['met'] else 'NO'} |")
    lines += ["", f"Wall time {wall:.0f} s on {os.cpu_count()} CPU(s)."]
    return "\n".join(lines)


def frontier_plot(summary: list[dict], path: Path, label: str, before: str | None = None) -> None:
    """Median gap against break share: Guardband's thresholds joined, the others as single points
    (and, dashed, Guardband's curve of the ``before`` label)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    groups = [g for g in dict.fromkeys(r["group"] for r in summary if r["label"] == label)]
    cols = min(3, len(groups))
    rows_n = math.ceil(len(groups) / cols)
    fig, axes = plt.subplots(rows_n, cols, figsize=(4.6 * cols, 3.9 * rows_n), squeeze=False)
    marks = {"textbook": ("#b2182b", "s"), "random": ("#777777", "x"), "classical": ("#8c6d31", "^")}
    for ax, group in zip(axes.flat, groups):
        rows = [r for r in summary if r["group"] == group and r["label"] == label]
        ours = sorted((r for r in rows if str(r["strategy"]).startswith("t=") and not r["ablation"]),
                      key=lambda r: float(r["threshold"]))
        finite = lambda v: float(v) if math.isfinite(float(v)) else np.nan  # noqa: E731
        if before:
            old = sorted((r for r in summary if r["group"] == group and r["label"] == before
                          and str(r["strategy"]).startswith("t=") and not r["ablation"]),
                         key=lambda r: float(r["threshold"]))
            ax.plot([100 * float(r["broken_share"]) for r in old], [finite(r["median_gap_pct"]) for r in old],
                    "--o", color="#92c5de", lw=1, ms=3, label=f"Guardband ({before})")
        if ours:
            xs = [100 * float(r["broken_share"]) for r in ours]
            ys = [finite(r["median_gap_pct"]) for r in ours]
            ax.plot(xs, ys, "-o", color="#2166ac", lw=1.5, ms=5, label=f"Guardband ({label})")
            for r, x, y in zip(ours, xs, ys):
                ax.annotate(f"{float(r['threshold']):g}", (x, y), textcoords="offset points", xytext=(4, 4),
                            fontsize=7, color="#2166ac")
        for r in rows:
            if r["strategy"] in marks:
                c, m = marks[r["strategy"]]
                ax.plot([100 * float(r["broken_share"])], [finite(r["median_gap_pct"])], m, color=c, ms=7,
                        label=r["strategy"])
            elif r["ablation"]:
                ax.plot([100 * float(r["broken_share"])], [finite(r["median_gap_pct"])], ".", color="#4d9221")
                ax.annotate(str(r["ablation"]), (100 * float(r["broken_share"]), finite(r["median_gap_pct"])),
                            textcoords="offset points", xytext=(3, -8), fontsize=6, color="#4d9221")
        ax.set_title(group, fontsize=10)
        ax.margins(0.08, 0.15)  # room for the threshold labels beside the points
        ax.set_xlabel("planned runs that broke a limit (%)", fontsize=8)
        ax.set_ylabel("median gap (% of range)", fontsize=8)
        ax.grid(alpha=0.3)
        ax.legend(fontsize=7, loc="best")
    for ax in list(axes.flat)[len(groups):]:
        ax.axis("off")
    title = "Gap against limit breaks (one run per step; threshold beside each Guardband point)"
    fig.suptitle(textwrap.fill(title, width=48 * cols), fontsize=10)  # a single panel is narrower than the title
    fig.tight_layout()
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    plt.close(fig)


def _with_peers(campaigns: list[dict], label: str, peers_from: str | None) -> list[dict]:
    """The campaigns of ``label``, plus the peers' campaigns of ``peers_from`` it lacks."""
    own = [c for c in campaigns if str(c["label"]) == label]
    if not peers_from or peers_from == label:
        return own
    have = {c["strategy"] for c in own}
    return own + [c for c in campaigns if str(c["label"]) == peers_from and not str(c["strategy"]).startswith("t=")
                  and c["strategy"] not in have]


def _options(args) -> dict:
    base = QUICK if args.quick else DEFAULTS
    opt = {k: getattr(args, k) if getattr(args, k) is not None else v for k, v in base.items()}
    opt["ablation_threshold"] = args.ablation_threshold
    unknown = [a for a in opt["ablations"] if a not in ABLATIONS]
    if unknown:
        raise SystemExit(f"unknown ablation(s) {unknown}; known: {', '.join(ABLATIONS)}")
    return opt


def _command(args, opt: dict) -> str:
    lst = lambda v: " ".join(f"{x:g}" if isinstance(x, float) else str(x) for x in v)  # noqa: E731
    return (f"python benchmarks/frontier.py --builtin {lst(opt['builtin'])} --family {opt['family']} "
            f"--seeds {opt['seeds']} --family-seeds {opt['family_seeds']} --budget {opt['budget']} --family-budget {opt['family_budget']} "
            f"--thresholds {lst(opt['thresholds'])} --peers {lst(opt['peers'])} "
            + (f"--ablations {lst(opt['ablations'])} --ablation-threshold {opt['ablation_threshold']:g} "
               if opt["ablations"] else "")
            + f"--pool {opt['pool']} --refine {opt['refine']} --workers {args.workers} --label {args.label}")


def _run(opt: dict, args, began: float) -> list[dict]:
    """Every campaign of this run, labelled."""
    problems = [(get_problem(n), n, opt["budget"], opt["seeds"]) for n in opt["builtin"]]
    family = run_in_workers(cal._family_job, [(i, args.family_seed) for i in range(opt["family"])],
                            workers=args.workers)
    problems += [(p, "family", opt["family_budget"], opt["family_seeds"]) for p in family]
    jobs = _jobs(problems, opt)

    def progress(done, total):
        if sys.stderr.isatty() or done == total or done % 20 == 0:
            print(f"\r{done}/{total} campaigns, {time.perf_counter() - began:.0f} s", end="", file=sys.stderr)

    out = run_in_workers(run_job, jobs, workers=args.workers, progress=progress)
    print(file=sys.stderr)
    return [{**c, "label": args.label} for c in out]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--builtin", nargs="*", help="built-in problems (default all four)")
    ap.add_argument("--family", type=int, help="first N problems of the generated family (default 28)")
    ap.add_argument("--family-seed", type=int, default=0)
    ap.add_argument("--seeds", type=int, help="campaigns per built-in problem and strategy")
    ap.add_argument("--family-seeds", type=int, help="campaigns per family problem and strategy (default 1)")
    ap.add_argument("--budget", type=int, help="planned runs per campaign on the built-in problems")
    ap.add_argument("--family-budget", type=int, help="planned runs per campaign on the family")
    ap.add_argument("--thresholds", type=float, nargs="*")
    ap.add_argument("--peers", nargs="*", help="textbook random classical (any of them)")
    ap.add_argument("--ablations", nargs="*", help=f"any of: {', '.join(ABLATIONS)}")
    ap.add_argument("--ablation-threshold", type=float, default=0.8)
    ap.add_argument("--pool", type=int)
    ap.add_argument("--refine", type=int)
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--workers", type=int, default=min(2, os.cpu_count() or 1))
    ap.add_argument("--label", default="current")
    ap.add_argument("--summarize-only", action="store_true",
                    help="run nothing: summarise the --label campaigns already in <out stem>_campaigns.csv")
    ap.add_argument("--peers-from", help="summarise this run with the peers' campaigns of another label "
                    "(same problems and seeds; the peers do not depend on Guardband's code)")
    ap.add_argument("--out", type=Path, default=Path("benchmarks/results/frontier.csv"))
    args = ap.parse_args(argv)
    opt = _options(args)
    began = time.perf_counter()
    campaigns = [] if args.summarize_only else _run(opt, args, began)
    wall = time.perf_counter() - began
    camp_path = args.out.with_name(args.out.stem + "_campaigns.csv")
    all_campaigns = (cal._read_rows(camp_path) if args.summarize_only
                     else cal._merge(camp_path, campaigns, args.label))
    summary = [row for lab in dict.fromkeys(str(c["label"]) for c in all_campaigns)
               for row in summarize(_with_peers(all_campaigns, lab, args.peers_from), lab)]
    command = _command(args, opt)
    print(markdown([r for r in summary if r["label"] == args.label], command, wall))
    comments = [f"[{args.label}] {command}", f"[{args.label}] wall time {wall:.0f} s on {os.cpu_count()} CPU(s)",
                "gap: best TRUE objective among runs that truly met every limit, from the optimum, % of range"]
    old = cal._comments(args.out)
    comments = old if args.summarize_only and old else [
        c for c in old if not c.startswith(f"[{args.label}] ")] + comments
    args.out.parent.mkdir(parents=True, exist_ok=True)
    atomic_write_text(camp_path, write_csv_text([{k: c.get(k) for k in CAMPAIGN_COLUMNS} for c in all_campaigns],
                                                CAMPAIGN_COLUMNS, comment_lines=comments, float_format=".6g"))
    atomic_write_text(args.out, write_csv_text(summary, SUMMARY_COLUMNS, comment_lines=comments,
                                               float_format=".6g"))
    frontier_plot(summary, args.out.with_suffix(".png"), args.label, args.peers_from)
    print(f"\nwrote {args.out}, {camp_path} and {args.out.with_suffix('.png')}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
