"""In-process planning steps at the sizes a sweep makes: 10 to 40 runs in 2 to 6 factors.

For each built-in problem (Gramacy: 2 factors; tablet: a 4-component
mixture; coating: 6 factors) and each run count, a starting design is
measured without noise and one planning step is timed twice: cold (no warm
start) and warm (the hyperparameters of the first step as its warm start,
as every step of a campaign after the first has). The protocols are the
problems' own; BLAS on one thread, as in a sweep. ``--explain off`` times
the step as the simulator runs it (without the rule comparison and the price
of the threshold); ``on`` (the default) as ``guardband plan`` does.
``--step light`` times the sweep's light step (``simulation.sweep.LIGHT_STEP``:
a smaller pool, one refinement, one model restart, set in the protocol, so
both trees run the same settings); ``both`` times the full and the light step.

With ``--reference DIR`` (a checkout of the code to compare with; see
``reference_tree.py``) each case runs in both trees in the same run, one
after the other, in two worker processes, so that the machine's load hits
both alike; the table gives each tree's median and the ratio.

    python benchmarks/step_time.py [--runs 10 25 40] [--repeat 3] [--explain on|off|both]
                                   [--step full|light|both] [--reference DIR] [--out FILE.csv]
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import time
from pathlib import Path

from reference_tree import environment, import_root

ROOT = Path(__file__).resolve().parents[1]


def run_case(name: str, n: int, repeat: int, explain: bool, light: dict | None = None) -> dict:
    """Cold and warm step times (s) of one case, ``repeat`` of each (in this process).

    ``light``: the light step's pool, refinements and restarts (at most these) and its search
    once per step, set in the protocol.
    """
    import numpy as np

    from guardband.planner.inputs.protocol import parse_protocol
    from guardband.planner.models import blas_limit
    from guardband.planner.simulation import get_problem, runs_table_from_arrays
    from guardband.planner.simulation.loop import start_runs
    from guardband.planner.step import plan_step

    problem = get_problem(name)
    protocol = problem.protocol
    if light:  # spelled out here, as simulation.sweep.Setting does it: a reference checkout may not have it
        data = protocol.model_dump(mode="python")
        data["batch"]["pool"] = min(data["batch"]["pool"], light["pool"])
        data["batch"]["refine"] = min(data["batch"]["refine"], light["refine"])
        data["model"]["restarts"] = min(data["model"]["restarts"], light["restarts"])
        if "search_per_run" in light and "search_per_run" in data["batch"]:  # a tree that has the setting
            data["batch"]["search_per_run"] = light["search_per_run"]
        protocol = parse_protocol(data, source=f"{name}, light step")
    cold, warm = [], []
    with blas_limit():
        X = start_runs(protocol, n, rng=np.random.default_rng(n))
        runs = runs_table_from_arrays(protocol, X, problem.evaluate(X))
        for r in range(repeat):
            t = time.perf_counter()
            first = plan_step(protocol, runs, seed=r, count=protocol.batch.size, explain=explain)
            cold.append(time.perf_counter() - t)
            t = time.perf_counter()
            plan_step(protocol, runs, seed=r + 100, count=protocol.batch.size,
                      warm_start=first.hyperparameters(), explain=explain)
            warm.append(time.perf_counter() - t)
    return {"factors": protocol.design_space().n_factors, "cold": cold, "warm": warm}


def worker() -> None:
    """Answer one case per line of stdin (JSON) with one line of JSON on stdout."""
    for line in sys.stdin:
        job = json.loads(line)
        print(json.dumps(run_case(job["name"], job["n"], job["repeat"], job["explain"], job.get("light"))),
              flush=True)


class Tree:
    """A worker process that imports one tree's code."""

    def __init__(self, label: str, checkout: Path | None):
        self.label = label
        root = import_root(checkout) if checkout is not None else None
        self.proc = subprocess.Popen([sys.executable, str(Path(__file__).resolve()), "--worker"],
                                     stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
                                     env=environment(root), cwd=root or ROOT)

    def run(self, **job) -> dict:
        self.proc.stdin.write(json.dumps(job) + "\n")
        self.proc.stdin.flush()
        line = self.proc.stdout.readline()
        if not line:
            raise SystemExit(f"the {self.label} worker stopped (see its error above)")
        return json.loads(line)

    def close(self) -> None:
        self.proc.stdin.close()
        self.proc.wait()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, nargs="+", default=[10, 25, 40])
    ap.add_argument("--problems", nargs="+", default=["gramacy", "tablet", "coating"])
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--explain", choices=["on", "off", "both"], default="on")
    ap.add_argument("--step", choices=["full", "light", "both"], default="full")
    ap.add_argument("--reference", type=Path, default=None, help="a checkout to compare with, side by side")
    ap.add_argument("--out", type=Path, default=None)
    ap.add_argument("--worker", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.worker:
        return worker()
    trees = [Tree("this tree", None)]
    if args.reference is not None:
        trees.insert(0, Tree("reference", args.reference))
    modes = {"on": [True], "off": [False], "both": [True, False]}[args.explain]
    steps = {"full": ["full"], "light": ["light"], "both": ["full", "light"]}[args.step]
    light = None
    if "light" in steps:
        from guardband.planner.simulation.sweep import LIGHT_STEP  # this tree's definition, for both trees
        light = dict(LIGHT_STEP)
    rows, warm_all = [], {(t.label, e, s): [] for t in trees for e in modes for s in steps}
    k = 0
    for name in args.problems:
        for n in args.runs:
            for explain in modes:
                for step in steps:
                    k += 1
                    # alternate which tree goes first, so that neither always meets the same load
                    order = trees if k % 2 else trees[::-1]
                    got = {t.label: t.run(name=name, n=n, repeat=args.repeat, explain=explain,
                                          light=light if step == "light" else None) for t in order}
                    cells = []
                    for t in trees:
                        res = got[t.label]
                        cold, warm = statistics.median(res["cold"]), statistics.median(res["warm"])
                        warm_all[(t.label, explain, step)] += res["warm"]
                        rows.append((name, res["factors"], n, t.label, explain, step, cold, warm))
                        cells.append(f"{t.label}: cold {cold:7.3f} s, warm {warm:7.3f} s")
                    ratio = ""
                    if len(trees) == 2:
                        ratio = f"  warm ratio {rows[-1][7] / rows[-2][7]:.2f}"
                    print(f"{name:8s} {rows[-1][1]} factors {n:3d} runs explain {'on ' if explain else 'off'} "
                          f"{step:5s}| " + " | ".join(cells) + ratio, flush=True)
    for explain in modes:
        for step in steps:
            meds = {t.label: statistics.median(warm_all[(t.label, explain, step)]) for t in trees}
            line = ", ".join(f"{label} {m:.3f} s" for label, m in meds.items())
            if len(trees) == 2:
                line += f" (ratio {meds['this tree'] / meds['reference']:.2f})"
            print(f"median warm step over every case, explain {'on' if explain else 'off'}, {step} step: {line}")
    for t in trees:
        t.close()
    if args.out:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text("problem,factors,runs,tree,explain,step,cold_median_s,warm_median_s\n"
                            + "".join(f"{a},{b},{c},{d},{e},{s},{f:.4f},{g:.4f}\n" for a, b, c, d, e, s, f, g in rows),
                            encoding="utf-8")


if __name__ == "__main__":
    main()
