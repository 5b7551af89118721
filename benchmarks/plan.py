"""One full planning step on workload W1, timed by phase.

W1: 300 runs, 8 continuous factors, one objective and three limits, batch
of 8 (the protocol's default pool of 4000 candidates and 4 local
refinements). Also times the same step at 1,000 runs. The responses are
invented smooth functions plus noise.

Usage::

    python benchmarks/plan.py            # 300 runs and 1,000 runs
    python benchmarks/plan.py --runs 300 # one size only
    python benchmarks/plan.py --runs 300 --no-guards  # without the short model and the widening
"""

from __future__ import annotations

import argparse
import time

import numpy as np


from guardband.planner.simulation import runs_table_from_arrays  # noqa: E402
from guardband.planner.inputs.protocol import parse_protocol  # noqa: E402
from guardband.planner.step import plan_step  # noqa: E402

D = 8


def w1_protocol(pool: int = 4000, guards: bool = True):
    return parse_protocol({
        "seed": 1,
        "study": {"title": "W1 benchmark", "version": "1", "author": "bench"},
        "factors": [{"name": f"x{i}", "kind": "continuous", "lower": 0.0, "upper": 1.0} for i in range(D)],
        "constraints": [{"rule": "x0 + x1 <= 1.6"}],
        "objective": {"name": "y", "direction": "minimize"},
        "limits": [
            {"name": "c1", "upper": 1.0, "probability": 0.95},
            {"name": "c2", "upper": 0.8, "probability": 0.95},
            {"name": "c3", "lower": -0.5, "upper": 1.5, "probability": 0.95},
        ],
        "screen": {"threshold": 0.9, "min_runs": 5, "short_model": guards, "widen_from_loo": guards},
        "ranking": {"rule": "ei"},
        "batch": {"size": 8, "pool": pool, "refine": 4},
        "model": {"restarts": 4},
    })


def truth(X: np.ndarray) -> dict:
    w = np.linspace(0.5, 1.5, D)
    return {
        "y": np.sum(w * (X - 0.4) ** 2, axis=1) + 0.3 * np.sin(3 * X[:, 0]) * X[:, 1],
        "c1": X[:, 2] + X[:, 3] ** 2 + 0.2 * np.cos(4 * X[:, 4]),
        "c2": 0.6 * X[:, 5] + 0.4 * X[:, 6] * X[:, 7] + 0.1 * X[:, 0],
        "c3": np.sum(X[:, :4], axis=1) - 1.0,
    }


def make_runs(protocol, n: int, seed: int = 0):
    rng = np.random.default_rng(seed)
    space = protocol.design_space()
    X = space.sample(n, rng=rng)
    t = truth(X)
    Y = {k: v + rng.normal(0, 0.02, n) for k, v in t.items()}
    return runs_table_from_arrays(protocol, X, Y)


def time_step(n: int, repeats: int, guards: bool = True) -> dict:
    protocol = w1_protocol(guards=guards)
    runs = make_runs(protocol, n)
    protocol.design_space().check()  # LPs solved once per protocol (cached), not per step
    times = []
    result = None
    for r in range(repeats):
        t0 = time.perf_counter()
        result = plan_step(protocol, runs, seed=r)
        times.append(time.perf_counter() - t0)
    return {"runs": n, "best_s": min(times), "median_s": float(np.median(times)),
            "proposals": len(result.proposals), "survived": result.counts()["survived"],
            "pool": int(result.pool.shape[0])}


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--runs", type=int, nargs="*", default=[300, 1000])
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--no-guards", action="store_true",
                    help="turn off screen.short_model and screen.widen_from_loo (to see what they cost)")
    args = ap.parse_args(argv)
    print("| runs | best of repeats (s) | median (s) | proposals | survivors / pool |")
    print("|---:|---:|---:|---:|---:|")
    for n in args.runs:
        r = time_step(n, args.repeats if n <= 300 else 1, guards=not args.no_guards)
        print(f"| {r['runs']} | {r['best_s']:.2f} | {r['median_s']:.2f} | {r['proposals']} | "
              f"{r['survived']} / {r['pool']} |", flush=True)
    print("\ntarget: W1 (300 runs, batch of 8) under 3 s on a 2-core machine")


if __name__ == "__main__":
    main()
