"""How far the screen vouches: the joint figure on the way from the best safe run to the optimum.

A built-in (or generated) problem's campaign is simulated for ``--budget`` planned runs
(one run per step, the given threshold); then the recipes on the straight
line from the best run that truly met every limit to the true constrained
optimum are judged as ``guardband judge`` would judge them against that
campaign's runs. Printed per point: its share of the way, its distance
from the nearest run that truly met every limit (unit-scaled, per
sqrt(number of factors), the unit of ``max_step``), the joint figure, each
limit's probability and the screen's verdict. The optimum of a problem
whose best region touches a limit lies on that limit, so the figure there
is at most about 1/2 per limit that binds; what matters is how soon the
figure falls on the way.

Run:  python benchmarks/reach.py [--problem coating] [--threshold 0.5] [--budget 6] [--seed 0] [--points 11]
"""

from __future__ import annotations

import argparse
import sys

import numpy as np

from guardband.planner.simulation import simulate
from guardband.planner.simulation.family import family_index, family_problem, with_settings
from guardband.planner.simulation.loop import runs_table_from_arrays
from guardband.planner.simulation.problems import get_problem
from guardband.planner.step.judge import judge_points


def _problem(name: str):
    """A built-in problem, or a generated one by its family name (``family-s0-033``)."""
    found = family_index(name)
    return get_problem(name) if found is None else family_problem(*found)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--problem", default="coating", help="a built-in problem, or family-s<seed>-<index>")
    ap.add_argument("--threshold", type=float, default=0.5)
    ap.add_argument("--budget", type=int, default=6)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--points", type=int, default=11)
    args = ap.parse_args(argv)
    problem = _problem(args.problem)
    p = with_settings(problem, threshold=args.threshold, batch=1, pool=1000, refine=1)
    result = simulate(p, None, budget=args.budget, seeds=1, strategies=("protocol",), noise_scale=1.0,
                      workers=1, seed=args.seed)
    h, protocol = result.histories["protocol"][0], result.protocol
    safe = ~h.broke_limit
    y = np.asarray(h.T[protocol.objective.name], dtype=float)
    best = h.X[safe][np.argmax(y[safe]) if protocol.maximize else np.argmin(y[safe])]
    ts = np.linspace(0.0, 1.0, args.points)
    X = best[None, :] + ts[:, None] * (np.asarray(problem.optimum_x) - best)[None, :]
    judged = judge_points(protocol, runs_table_from_arrays(protocol, h.X, h.Y), X,
                          [f"{t:.2f}" for t in ts], seed=args.seed + 1)
    lo = np.array([f.lower for f in protocol.factors], dtype=float)
    span = np.array([f.upper for f in protocol.factors], dtype=float) - lo
    U, U_safe = (X - lo) / span, (h.X[safe] - lo) / span
    dist = np.min(np.linalg.norm(U[:, None, :] - U_safe[None, :, :], axis=2), axis=1) / np.sqrt(X.shape[1])
    print(f"{problem.name}, threshold {args.threshold:g}, after {args.budget} planned runs (seed {args.seed})\n")
    names = list(judged.verdicts[0].p)
    print("| share of the way | distance from a safe run | joint | " + " | ".join(f"p {n}" for n in names)
          + " | verdict |")
    print("|---:|---:|---:|" + "---:|" * len(names) + "---|")
    for t, d, v in zip(ts, dist, judged.verdicts):
        ps = " | ".join(f"{v.p[n]:.3f}" for n in names)
        print(f"| {t:.2f} | {d:.3f} | {v.joint:.3f} | {ps} | {v.reason} |")
    return 0


if __name__ == "__main__":
    sys.exit(main())
