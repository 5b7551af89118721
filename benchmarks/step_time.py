"""In-process planning steps at the sizes a sweep makes: 10 to 40 runs in 2 to 6 factors.

For each built-in problem (Gramacy: 2 factors; tablet: a 4-component
mixture; coating: 6 factors) and each run count, a starting design is
measured without noise and one planning step is timed twice: cold (no warm
start) and warm (the hyperparameters of the first step as its warm start,
as every step of a campaign after the first has). The protocols are the
problems' own; BLAS on one thread, as in a sweep.

    python benchmarks/step_time.py [--runs 10 25 40] [--repeat 3] [--out FILE.csv]
"""

from __future__ import annotations

import argparse
import statistics
import time
from pathlib import Path

import numpy as np

from guardband.planner.models import blas_limit
from guardband.planner.simulation import get_problem, runs_table_from_arrays
from guardband.planner.simulation.loop import start_runs
from guardband.planner.step import plan_step


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, nargs="+", default=[10, 25, 40])
    ap.add_argument("--problems", nargs="+", default=["gramacy", "tablet", "coating"])
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--out", type=Path, default=None)
    args = ap.parse_args()
    rows, warm_all = [], []
    with blas_limit():
        for name in args.problems:
            problem = get_problem(name)
            protocol = problem.protocol
            for n in args.runs:
                X = start_runs(protocol, n, rng=np.random.default_rng(n))
                runs = runs_table_from_arrays(protocol, X, problem.evaluate(X))
                cold, warm = [], []
                for r in range(args.repeat):
                    t = time.perf_counter()
                    first = plan_step(protocol, runs, seed=r, count=protocol.batch.size)
                    cold.append(time.perf_counter() - t)
                    t = time.perf_counter()
                    plan_step(protocol, runs, seed=r + 100, count=protocol.batch.size,
                              warm_start=first.hyperparameters())
                    warm.append(time.perf_counter() - t)
                warm_all += warm
                rows.append((name, protocol.design_space().n_factors, n, statistics.median(cold),
                             statistics.median(warm)))
                print(f"{name:8s} {rows[-1][1]} factors {n:3d} runs: cold {rows[-1][3]:.3f} s, "
                      f"warm {rows[-1][4]:.3f} s (median of {args.repeat})", flush=True)
    print(f"median warm step over every case: {statistics.median(warm_all):.3f} s")
    if args.out:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text("problem,factors,runs,cold_median_s,warm_median_s\n"
                            + "".join(f"{a},{b},{c},{d:.4f},{e:.4f}\n" for a, b, c, d, e in rows), encoding="utf-8")


if __name__ == "__main__":
    main()
