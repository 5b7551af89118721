"""Does rounding to a resolution push refined candidates out of the screen?

The tablet example with every varying component at a resolution of 0.001
(of a fraction) and the compression force at 0.5 kN, planned at seeds 1 to
6 (the protocol's pool and batch). For each refinement margin it counts the
refined candidates that passed the screen before rounding and those of them
that fail after it, and whether the first pick is still a refined one (its
rounding, or a grid neighbour of it).

Usage::

    python benchmarks/rounding.py                 # margins 0.001 (the default), 0.005, 0.01
    python benchmarks/rounding.py --margins 0.001
    python benchmarks/rounding.py --resolution 0.005 --force 1  # coarser grids
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import guardband.planner.step.plan as plan  # noqa: E402
import guardband.planner.step.refine as refine  # noqa: E402
from guardband.planner.inputs.protocol import load_protocol, parse_protocol  # noqa: E402
from guardband.planner.inputs.runs import read_runs  # noqa: E402


def _protocol(resolution: float, force: float):
    data = load_protocol(ROOT / "protocols" / "tablet_blend.toml").model_dump(mode="python")
    for f in data["factors"]:
        if f["kind"] == "component" and f["lower"] < f["upper"]:
            f["resolution"] = resolution
        if f["name"] == "force":
            f["resolution"] = force
    return parse_protocol(data)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--margins", type=float, nargs="+", default=[1e-3, 5e-3, 1e-2])
    ap.add_argument("--seeds", type=int, default=6)
    ap.add_argument("--resolution", type=float, default=0.001, help="of each varying component")
    ap.add_argument("--force", type=float, default=0.5, help="resolution of the force (kN)")
    args = ap.parse_args()
    p = _protocol(args.resolution, args.force)
    runs = read_runs(ROOT / "protocols" / "tablet_blend_runs.csv", p)
    seen = {}
    phase = plan._rounding_phase

    def counting(ctx, pool, origin, scores_of, inc_value):
        out = phase(ctx, pool, origin, scores_of, inc_value)
        refined = np.array(["refined" in str(o) for o in origin])
        before = pool.result.survives & refined
        after = out[0].result.survives[: before.size]
        seen["counts"] = (int(before.sum()), int((before & ~after).sum()))
        return out

    plan._rounding_phase = counting
    plain = load_protocol(ROOT / "protocols" / "tablet_blend.toml")
    unrounded = [plan.plan_step(plain, runs, seed=seed, explain=False).proposals[0].mean
                 for seed in range(1, args.seeds + 1)]
    print(f"first pick's predicted objective without resolutions, median over seeds: {np.median(unrounded):.3f}")
    print("margin | refined passing before rounding | of them failing after | first pick refined | "
          "first pick's predicted objective, median")
    for margin in args.margins:
        refine.REFINE_MARGIN = margin
        passed = failed = first_refined = 0
        means = []
        for seed in range(1, args.seeds + 1):
            result = plan.plan_step(p, runs, seed=seed, explain=False)
            passed += seen["counts"][0]
            failed += seen["counts"][1]
            first_refined += bool(result.proposals) and "refined" in result.proposals[0].origin
            means.append(result.proposals[0].mean if result.proposals else np.nan)
        print(f"{margin:g} | {passed} | {failed} | {first_refined}/{args.seeds} | {np.nanmedian(means):.3f}")


if __name__ == "__main__":
    main()
