"""Where a batch loses reach: the batch-to-one-run ratio split by how far each campaign starts.

A step's picks must all pass the screen on the models fitted to the runs
measured so far, so however many runs a step proposes, it can go only as
far as those models vouch for. A campaign whose starting runs lie far from
the optimum walks there step by step, and a batch of 4 takes a quarter of
the steps of one run at a time in the same runs. This script puts a number
on that: for each family problem of a ``batches.py`` campaigns file it
takes the gap of the best starting run that truly met every limit (the
same starting runs every campaign of that problem and seed uses, in % of
the objective's range), splits the problems at the median of that gap,
and prints, per batch size and method, the median gap and its ratio to
one run per step, and the geometric mean of the per-problem ratios
((gap + 0.01) / (one-at-a-time gap + 0.01), gaps below 0 taken as 0), for
each half.

Run:  python benchmarks/batch_split.py benchmarks/results/batches_table_t08_campaigns.csv [...] [--workers 2]
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent))  # the other benchmark scripts, not the package

import calibration as cal  # noqa: E402  (the family jobs)
import frontier as fr  # noqa: E402  (the true gap)

from guardband.planner.simulation import simulate  # noqa: E402
from guardband.planner.simulation.family import family_index, with_settings  # noqa: E402
from guardband.planner.simulation.problems import objective_range  # noqa: E402
from guardband.planner.simulation.runner import run_in_workers  # noqa: E402

#: The campaigns' seed: batches.py runs one campaign per family problem, seed 0.
SEED = 0


def start_gap(problem) -> tuple[str, float]:
    """(problem name, gap of its best starting run that truly met every limit, % of range)."""
    p = with_settings(problem, threshold=0.8, batch=1, pool=100, refine=0)
    # the simulator plans at least one step; only the starting runs before it are read
    result = simulate(p, None, budget=1, seeds=1, strategies=("protocol",), noise_scale=1.0, workers=1, seed=SEED)
    h = result.histories["protocol"][0]
    gap = fr.true_gap(h, result.protocol, problem.optimum, among=~h.planned)
    return problem.name, 100.0 * gap / objective_range(problem)


def split_rows(campaigns: pd.DataFrame, starts: pd.Series) -> list[dict]:
    """Per file, batch size above 1 and method: the two halves' medians and ratios."""
    rows = []
    far = starts > starts.median()
    for source, df in campaigns.groupby("source", sort=False):
        one = df[df.batch == 1].drop_duplicates("problem").set_index("problem").gap_pct.clip(lower=0)
        for (batch, method), d in df[df.batch > 1].groupby(["batch", "method"]):
            g = d.drop_duplicates("problem").set_index("problem").gap_pct.clip(lower=0)
            for half, mask in (("far", far), ("near", ~far)):
                names = [n for n in g.index if n in one.index and n in mask.index and mask[n]]
                ratio = (g[names] + 0.01) / (one[names] + 0.01)
                rows.append({"source": source, "batch": batch, "method": method, "starts": half,
                             "problems": len(names), "one": one[names].median(), "batch_gap": g[names].median(),
                             "x_one": g[names].median() / one[names].median(),
                             "geo": float(np.exp(np.log(ratio).mean()))})
    return rows


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("campaigns", nargs="+", type=Path, help="batches.py campaigns files")
    ap.add_argument("--workers", type=int, default=min(2, os.cpu_count() or 1))
    args = ap.parse_args(argv)
    frames = [pd.read_csv(f, comment="#").assign(source=f.name) for f in args.campaigns]
    campaigns = pd.concat(frames)
    campaigns = campaigns[(campaigns.group == "family") & (campaigns.seed == SEED)]
    names = sorted(set(campaigns.problem))
    problems = run_in_workers(cal._family_job, [family_index(n) for n in names], workers=args.workers)
    starts = pd.Series(dict(run_in_workers(start_gap, problems, workers=args.workers)))
    print(f"gap of the best starting run: median {starts.median():.1f}% of the range "
          f"(far: above it, {int((starts > starts.median()).sum())} problems)\n")
    print("| file | batch | method | starts | problems | one at a time | batch | x one | geometric mean |")
    print("|---|---:|---|---|---:|---:|---:|---:|---:|")
    for r in split_rows(campaigns, starts):
        print(f"| {r['source']} | {r['batch']} | {r['method']} | {r['starts']} | {r['problems']} | {r['one']:.2f} | "
              f"{r['batch_gap']:.2f} | {r['x_one']:.2f} | {r['geo']:.2f} |")
    return 0


if __name__ == "__main__":
    sys.exit(main())
