"""Planning quality on the built-in test problems: gap, safety and calibration.

For every case (a problem with its start size and budget) this runs
``planner.simulate.simulate`` with every strategy (the problem's own
settings, the four ranking rules, random runs, the classical route and the
screen switched off) over many seeds, and checks three targets:

1. the protocol's settings reach a median gap to the known optimum at
   least 3 times smaller than random runs and than the classical route;
2. with the screen on (joint threshold 0.95) at most 5% of planned runs
   break a limit (pooled over seeds), and with it off visibly more (at
   least twice as many and at least 10 percentage points more);
3. calibration: the mean joint figure the screen promised against the
   observed share of planned runs that met every limit, overall, by bins
   of the promise, and for the first planning step against the later ones.

Measurement is noise-free by default (``--noise 1`` uses each problem's
stated noise; the dose problem then measures the toxicity rate as a count
out of a cohort of 6).

Run:  python benchmarks/quality.py [--seeds 20] [--workers 2] [--cases gramacy tablet dose coating]
          [--noise 0] [--out benchmarks/results/quality.csv]
      python benchmarks/quality.py --cases gramacy-plain coating-noise-estimated \
          --out benchmarks/results/quality_ablations.csv      # the ablations
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


from guardband.planner.app.fileio import atomic_write_text, write_csv_text  # noqa: E402
from guardband.planner.inputs.protocol import parse_protocol  # noqa: E402
from guardband.planner.simulation import PLANNER_STRATEGIES, STRATEGIES, get_problem, simulate  # noqa: E402

#: The targets' strategies (the cheaper set, for extra cases).
CORE = ("protocol", "random", "classical", "screen-off")
#: name -> (problem, starting runs, planned runs, strategies, settings changed
#: from the problem's protocol: {section: {key: value}}, or
#: {"measurement_sd": None} to drop every stated measurement sd).
#: "gramacy-20" follows the rule of thumb of 10 starting runs per factor
#: (Loeppky, Sacks & Welch 2009, Technometrics 51:366-376; from memory);
#: "gramacy-plain" turns off the short model and the leave-one-out widening
#: of the limit models (what they buy); "coating-noise-estimated" drops the
#: assays' stated repeatability, so the models estimate the noise.
CASES = {
    "gramacy": ("gramacy", 10, 30, STRATEGIES, {}),
    "gramacy-plain": ("gramacy", 10, 30, ("protocol",), {"screen": {"short_model": False, "widen_from_loo": False}}),
    "gramacy-15": ("gramacy", 15, 30, CORE, {}),
    "gramacy-20": ("gramacy", 20, 30, CORE, {}),
    "tablet": ("tablet", 10, 30, STRATEGIES, {}),
    "dose": ("dose", 4, 20, STRATEGIES, {}),
    "coating": ("coating", 15, 45, STRATEGIES, {}),
    "coating-noise-estimated": ("coating", 15, 45, ("protocol",), {"measurement_sd": None}),
}
DEFAULT_CASES = ("gramacy", "tablet", "dose", "coating", "gramacy-15", "gramacy-20")
#: ablations, run with --cases (their figures go to quality_ablations.csv in the README)
ABLATIONS = ("gramacy-plain", "coating-noise-estimated")
GAP_RATIO = 3.0
MAX_BROKEN = 0.05
BINS = (0.95, 0.97, 0.99, 1.0 + 1e-12)


def _ratio(other: float, mine: float) -> float:
    if mine == 0:
        return math.inf if other > 0 else float("nan")
    return other / mine if mine > 0 else float("nan")


def _calibration(result, strategy: str) -> dict:
    """Promise against outcome: overall, by bins of the promise, first step against the rest."""
    promised, met, first = [], [], []
    batch = result.protocol.batch.size
    for h in result.histories[strategy]:
        idx = np.flatnonzero(h.planned)
        promised.append(h.promised[idx])
        met.append(~h.broke_limit[idx])
        first.append(np.arange(idx.size) < batch)
    p, m, f = np.concatenate(promised), np.concatenate(met), np.concatenate(first)
    out = {"promised": float(np.mean(p)), "met": float(np.mean(m)),
           "first_step_broken": float(np.mean(~m[f])) if f.any() else float("nan"),
           "later_broken": float(np.mean(~m[~f])) if (~f).any() else float("nan"), "bins": []}
    for lo, hi in zip(BINS[:-1], BINS[1:]):
        sel = (p >= lo) & (p < hi)
        if sel.any():
            out["bins"].append((lo, min(hi, 1.0), int(sel.sum()), float(np.mean(p[sel])), float(np.mean(m[sel]))))
    return out


def run_case(name: str, *, seeds: int, workers: int, noise: float) -> dict:
    problem, n_start, budget, strategies, changes = CASES[name]
    problem_name = problem
    settings = None
    changes = dict(changes)
    if "measurement_sd" in changes:
        # the assays' repeatability belongs to the problem's world, not to the settings
        changes.pop("measurement_sd")
        world = get_problem(problem)
        data = copy.deepcopy(world.protocol_dict)
        for item in [data["objective"], *data["limits"]]:
            item.pop("measurement_sd", None)
        problem = dataclasses.replace(world, protocol_dict=data)
    if changes:
        base = problem if not isinstance(problem, str) else get_problem(problem)
        data = base.protocol.model_dump(mode="python")
        for section, values in changes.items():
            data[section].update(values)
        settings = parse_protocol(data, source=f"case {name}")
    began = time.perf_counter()
    result = simulate(problem, settings, budget=budget, seeds=seeds, n_start=n_start,
                      strategies=strategies, noise_scale=noise, workers=workers)
    wall = time.perf_counter() - began
    final = {r["strategy"]: r for r in result.final_rows()}
    # with noise, judge by the true value at the run the lab would pick
    key = "gap_true_median" if noise > 0 else "gap_median"
    gap = {s: final[s][key] for s in strategies}
    broken = {s: final[s]["broken_pooled"] for s in strategies}
    cal = {s: _calibration(result, s) for s in PLANNER_STRATEGIES
           if s in strategies and s not in result.same_as}
    # an ablation case runs the protocol's strategy alone: no ratios there
    nan = float("nan")
    ratio_random = _ratio(gap["random"], gap["protocol"]) if "random" in gap else nan
    ratio_classical = _ratio(gap["classical"], gap["protocol"]) if "classical" in gap else nan
    on, off = broken["protocol"], broken.get("screen-off", nan)
    return {
        "case": name, "problem": problem_name, "n_start": n_start, "budget": budget, "seeds": seeds,
        "wall_s": wall, "result": result, "final": final, "calibration": cal,
        "ratio_random": ratio_random, "ratio_classical": ratio_classical,
        "gap_ok": ratio_random >= GAP_RATIO and ratio_classical >= GAP_RATIO,
        "broken_ok": on <= MAX_BROKEN,
        "off_ok": off >= 2 * on and off - on >= 0.10,
    }


def _f(v, digits=3) -> str:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "-"
    if isinstance(v, float) and math.isinf(v):
        return "inf"
    return f"{v:.{digits}g}"


def _pct(v) -> str:
    return "-" if v is None or not math.isfinite(v) else f"{100 * v:.1f}%"


def markdown(cases: list[dict], command: str, total_wall: float) -> str:
    lines = [f"Reproduce: `{command}`", ""]
    lines += ["Cases with changed settings: " + ("; ".join(
        f"{c['case']}: {CASES[c['case']][4]}" for c in cases if CASES[c["case"]][4]) or "none"), ""]
    lines += ["| case | start+budget | strategy | median gap [IQR] | true gap at the chosen run | "
              "broke a limit (pooled) | no safe run | stalled |",
              "|---|---|---|---|---|---:|---:|---:|"]
    for c in cases:
        for s in c["result"].strategies:
            r = c["final"][s]
            label = s + (f" (= {r['same_as']})" if r["same_as"] else "")
            lines.append(f"| {c['case']} | {c['n_start']}+{c['budget']} | {label} | "
                         f"{_f(r['gap_median'])} [{_f(r['gap_q25'])}, {_f(r['gap_q75'])}] | "
                         f"{_f(r['gap_true_median'])} [{_f(r['gap_true_q25'])}, {_f(r['gap_true_q75'])}] | "
                         f"{_pct(r['broken_pooled'])} | {r['no_safe_run']} | {r['stalled']} |")
    lines += ["", "| case | seeds | gap ratio random/protocol | classical/protocol | gap target (>= 3) | "
              "broken, screen on | screen off | screen targets | wall time |",
              "|---|---:|---:|---:|---|---:|---:|---|---:|"]
    for c in cases:
        f = c["final"]
        if "screen-off" not in f:  # an ablation case: the protocol's strategy alone
            lines.append(f"| {c['case']} | {c['seeds']} | - | - | - | {_pct(f['protocol']['broken_pooled'])} | - | "
                         f"{'<= 5%: ' + ('met' if c['broken_ok'] else 'NOT met')} | {c['wall_s']:.0f} s |")
            continue
        lines.append(f"| {c['case']} | {c['seeds']} | {_f(c['ratio_random'])} | {_f(c['ratio_classical'])} | "
                     f"{'met' if c['gap_ok'] else 'NOT met'} | {_pct(f['protocol']['broken_pooled'])} | "
                     f"{_pct(f['screen-off']['broken_pooled'])} | "
                     f"{'<= 5%: ' + ('met' if c['broken_ok'] else 'NOT met')}; "
                     f"{'off visibly higher: ' + ('met' if c['off_ok'] else 'NOT met')} | {c['wall_s']:.0f} s |")
    lines += ["", "Calibration of the screen (planned runs of all seeds; screen-off promises nothing):", "",
              "| case | strategy | mean promised joint | observed share meeting every limit | "
              "broken, first step | broken, later steps | by promise: [lo, hi) n promised observed |",
              "|---|---|---:|---:|---:|---:|---|"]
    for c in cases:
        for s, cal in c["calibration"].items():
            if s == "screen-off":
                continue
            bins = "; ".join(f"[{lo:g}, {hi:g}) {n} {_f(p, 3)} {_f(m, 3)}" for lo, hi, n, p, m in cal["bins"])
            lines.append(f"| {c['case']} | {s} | {_f(cal['promised'], 4)} | {_f(cal['met'], 4)} | "
                         f"{_pct(cal['first_step_broken'])} | {_pct(cal['later_broken'])} | {bins} |")
    lines += ["", f"Total wall time {total_wall:.0f} s on {os.cpu_count()} CPU(s)."]
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seeds", type=int, default=20)
    ap.add_argument("--workers", type=int, default=min(2, os.cpu_count() or 1))
    ap.add_argument("--cases", nargs="*", default=list(DEFAULT_CASES), choices=sorted(CASES))
    ap.add_argument("--noise", type=float, default=0.0, help="noise scale (0 = noise-free)")
    ap.add_argument("--out", type=Path, default=Path("benchmarks/results/quality.csv"))
    args = ap.parse_args(argv)
    command = "python benchmarks/quality.py " + " ".join(
        [f"--seeds {args.seeds}", f"--workers {args.workers}", "--cases " + " ".join(args.cases),
         f"--noise {args.noise:g}"])
    began = time.perf_counter()
    cases = []
    for name in args.cases:
        c = run_case(name, seeds=args.seeds, workers=args.workers, noise=args.noise)
        print(f"{name}: {c['wall_s']:.0f} s", file=sys.stderr)
        cases.append(c)
    total = time.perf_counter() - began
    print(markdown(cases, command, total))
    header = ["case", "problem", "n_start", "budget", "strategy", "same_as", "seeds", "gap_q25", "gap_median",
              "gap_q75", "gap_true_q25", "gap_true_median", "gap_true_q75", "best_median", "broken_pooled", "broken_median", "no_safe_run", "stalled",
              "promised_joint_mean", "observed_met_share", "wall_s"]
    rows = [[c["case"], c["problem"], c["n_start"], c["budget"], s] + [c["final"][s][k] for k in header[5:-1]]
            + [round(c["wall_s"], 1)] for c in cases for s in c["result"].strategies]
    args.out.parent.mkdir(parents=True, exist_ok=True)
    atomic_write_text(args.out, write_csv_text(rows, header, comment_lines=[command], float_format=".6g"))
    runs_header = ["case"] + list(cases[0]["result"].CSV_COLUMNS) if cases else ["case"]
    runs = [[c["case"]] + [r[k] for k in runs_header[1:]] for c in cases for r in c["result"].summary_rows()]
    runs_path = args.out.with_name(args.out.stem + "_runs.csv")
    atomic_write_text(runs_path, write_csv_text(runs, runs_header, comment_lines=[command], float_format=".6g"))
    print(f"\nwrote {args.out} and {runs_path}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
