"""How long a sweep of the tablet protocol takes, with the full and the light step, and what the light step costs.

The sweep of the issue "fast enough to sweep": 5 thresholds x 2 scenarios x
N seeds x 30 planned runs one at a time (10 starting runs, so every step
sees 10 to 40 runs), on ``protocols/tablet_blend.toml`` and two scenarios of
``protocols/scenarios/tablet_blend_scenarios.toml`` (default ``expected``
and ``pessimistic``), as ``guardband simulate ... --vary threshold=...
--vary batch=1 --vary step=...`` runs it, on ``--workers`` processes.

Each ``--step`` given runs with its own seed count (``--seeds light=20
full=4``: a stated fraction of a long run; seed i is the same campaign
start in both). The wall and CPU time of each is printed (with the load
average before and after: the machine may be shared), then, side by side on
the seeds both ran, each cell's true gap at the end, the share of planned
runs that broke a limit, and the mean promise against the share that met
every limit.

    python benchmarks/sweep_time.py [--steps light full] [--seeds light=20 full=4] [--workers 2]
                                    [--scenarios expected pessimistic] [--out DIR]
"""

from __future__ import annotations

import argparse
import os
import resource
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
THRESHOLDS = [0.9, 0.925, 0.95, 0.975, 0.99]


def _cpu() -> float:
    """CPU seconds of this process, its finished children and (with psutil) its live worker processes."""
    me, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    total = me.ru_utime + me.ru_stime + kids.ru_utime + kids.ru_stime
    try:
        import psutil
    except ImportError:  # the pool's workers stay alive between sweeps: not counted
        return total
    for child in psutil.Process().children(recursive=True):
        try:
            t = child.cpu_times()
            total += t.user + t.system
        except psutil.Error:
            pass
    return total


def run(step: str, seeds: int, scenarios, protocol, workers: int, budget: int):
    from guardband.planner.simulation.sweep import run_sweep

    load = os.getloadavg()[0]
    t, c = time.perf_counter(), _cpu()
    result = run_sweep(scenarios, lambda sc: protocol, vary={"threshold": THRESHOLDS, "batch": [1], "step": [step]},
                       seeds=seeds, n_start=10, budget=budget, workers=workers)
    wall, cpu = time.perf_counter() - t, _cpu() - c
    steps = sum(int(h.planned.sum()) for cell in result.cells for h in cell.result.histories["protocol"])
    print(f"{step} step, {seeds} seeds: {len(result.cells) * seeds} campaigns, {steps} planning steps (one per "
          f"planned run) in {wall:.0f} s of wall time, {cpu:.0f} s of CPU time on {workers} worker(s); load average "
          f"{load:.1f} before, {os.getloadavg()[0]:.1f} after", flush=True)
    return result, wall, cpu, steps


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--steps", nargs="+", default=["light", "full"], choices=["light", "full"])
    ap.add_argument("--seeds", nargs="+", default=["light=20", "full=4"], help="STEP=N for each step")
    ap.add_argument("--scenarios", nargs="+", default=["expected", "pessimistic"])
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--budget", type=int, default=30)
    ap.add_argument("--out", type=Path, default=None, help="write each step's sweep.csv here")
    args = ap.parse_args()
    seeds = {k: int(v) for k, _, v in (s.partition("=") for s in args.seeds)}

    from guardband.planner.inputs.protocol import load_protocol
    from guardband.planner.simulation.scenarios import load_scenarios

    protocol = load_protocol(ROOT / "protocols" / "tablet_blend.toml")
    found = load_scenarios(ROOT / "protocols" / "scenarios" / "tablet_blend_scenarios.toml", protocol)
    scenarios = [sc for sc in found.scenarios if sc.name in args.scenarios]
    runs = {step: run(step, seeds[step], scenarios, protocol, args.workers, args.budget) for step in args.steps}
    for step, (result, wall, cpu, steps) in runs.items():
        if args.out:
            args.out.mkdir(parents=True, exist_ok=True)
            (args.out / f"sweep-{step}.csv").write_text(result.csv_text(), encoding="utf-8")
    if len(runs) == 2:
        # side by side on the seeds both ran (seed i: the same starting runs and truth)
        common = min(seeds[s] for s in runs)
        again = {s: (runs[s][0] if seeds[s] == common else
                     run(s, common, scenarios, protocol, args.workers, args.budget)[0]) for s in runs}
        print(f"\nside by side on seeds 0 to {common - 1}: true gap at the end, median [quartiles]; planned "
              "runs that broke a limit; mean promise / share that met every limit")
        for row_l, row_f in zip(*(again[s].rows() for s in args.steps)):
            cells = []
            for step, row in zip(args.steps, (row_l, row_f)):
                cells.append(f"{step}: {row['gap_true_median']:.3g} [{row['gap_true_q25']:.3g}, "
                             f"{row['gap_true_q75']:.3g}], {100 * row['broken_pooled']:.1f}%, "
                             f"{row['promised_joint_mean']:.3f} / {row['observed_met_share']:.3f}, "
                             f"stalled {row['stalled']}")
            print(f"threshold {row_l['threshold']:<6g} {row_l['scenario']:12s} " + " | ".join(cells))


if __name__ == "__main__":
    main()
