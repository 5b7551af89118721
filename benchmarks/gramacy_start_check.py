"""Why the Gramacy campaign with 15 starting runs stays in the 0.75 basin.

For each seed: a campaign of 15 starting runs plus 30 planned runs, the best
measured objective among runs that met both limits, and, at the first
planning step, the probability each limit model gives the published
optimum (about (0.1954, 0.4044), Gramacy et al. 2016; from memory) of
meeting its limit, with the distance from the optimum to the nearest
starting run and to the nearest starting run that met both limits.

Run: python benchmarks/gramacy_start_check.py [--seeds 6] [--start 15]
"""

from __future__ import annotations

import argparse

import numpy as np


import guardband.planner.simulation.loop as campaign  # noqa: E402
from guardband.planner.simulation import get_problem  # noqa: E402
from guardband.safety.screen import limit_probability  # noqa: E402

X_OPT = np.array([[0.1954, 0.4044]])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seeds", type=int, default=6)
    ap.add_argument("--start", type=int, default=15)
    args = ap.parse_args(argv)
    problem = get_problem("gramacy")
    protocol = problem.protocol
    steps = []
    plan_step = campaign.plan_step

    def recording(*a, **k):
        result = plan_step(*a, **k)
        steps.append((result, a[1]))
        return result

    campaign.plan_step = recording
    try:
        print("| seed | best safe objective | P(c1 met) at the optimum, step 1 | P(c2 met) | "
              "nearest start | it met both limits | nearest start that met both |")
        print("|---:|---:|---:|---:|---:|---|---:|")
        for seed in range(args.seeds):
            steps.clear()
            history = campaign.run_campaign(protocol, problem.evaluate, n_start=args.start, budget=30, seed=seed)
            first, runs = steps[0]
            U = first.unit(X_OPT)
            p = [float(limit_probability(*first.fitted[lim.name].predict(U, include_noise=True),
                                         lower=lim.lower, upper=lim.upper)[0]) for lim in protocol.limits]
            truth = problem.evaluate(runs.X)
            safe = np.all([truth[lim.name] <= lim.upper for lim in protocol.limits], axis=0)
            d = np.sqrt(((runs.X - X_OPT) ** 2).sum(axis=1))
            print(f"| {seed} | {np.nanmin(history.best_safe):.4f} | {p[0]:.3f} | {p[1]:.3f} | {d.min():.3f} | "
                  f"{'yes' if safe[np.argmin(d)] else 'no'} | {d[safe].min():.3f} |")
    finally:
        campaign.plan_step = plan_step
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
