"""Do two checkouts plan alike, bit for bit? A check for changes meant only to be faster.

For each built-in problem and run count, a starting design is measured and
two planning steps are run (cold, then warm from the first step's
hyperparameters), with and without the rule comparison and the price of the
threshold, in this tree and in a reference checkout (``--reference DIR``;
see ``reference_tree.py``). Each step is reduced to one SHA-256 over
everything it decided: the pool, every screen figure and sentence, the
proposals and their values, the messages, the model summaries and
hyperparameters, the rule picks and the price. Then the design space's
answers (emptiness and conflicts, ranges, centre, samples, projection) on
the built-in problems, the example protocols and random polytopes (with
equalities, flat and thin ones, and discrete levels no combination of
which is feasible). Differences are printed; the exit code is 1 if any.

tests/test_golden.py checks the two example plans' files; this covers
more steps, without a stored hash.

    python benchmarks/same_results.py --reference DIR [--problems gramacy tablet] [--runs 10 25 40]
"""

from __future__ import annotations

import argparse
import hashlib
import json
import subprocess
import sys
import warnings
from pathlib import Path

from reference_tree import environment, import_root

ROOT = Path(__file__).resolve().parents[1]


def _digest(*parts) -> str:
    import numpy as np

    h = hashlib.sha256()
    for x in parts:
        if isinstance(x, np.ndarray) and x.dtype != object:
            h.update(np.ascontiguousarray(x).tobytes())
        elif isinstance(x, np.ndarray):
            h.update(repr(x.tolist()).encode())
        else:
            h.update(repr(x).encode())
    return h.hexdigest()[:16]


def step_digest(res) -> str:
    """Everything a planning step decided, as one short hash."""
    s = res.screen
    props = [(p.x, p.origin, p.mean, p.sd, p.lo95, p.hi95, p.p, p.joint, p.values, p.score, p.given_earlier,
              p.reason) for p in res.proposals]
    return _digest(res.pool, res.origin, res.scores, s.survives, s.reason, list(s.detail), s.P, s.joint, s.step,
                   s.messages, props, res.models, res.messages, res.rule_picks, res.threshold_price, res.incumbent,
                   res.mode, res.hyperparameters())


def steps(problems, runs) -> dict:
    import numpy as np

    from guardband.planner.models import blas_limit
    from guardband.planner.simulation import get_problem, runs_table_from_arrays
    from guardband.planner.simulation.loop import start_runs
    from guardband.planner.step import plan_step

    out = {}
    with blas_limit():
        for name in problems:
            problem = get_problem(name)
            protocol = problem.protocol
            for n in runs:
                X = start_runs(protocol, n, rng=np.random.default_rng(n))
                table = runs_table_from_arrays(protocol, X, problem.evaluate(X))
                for explain in (True, False):
                    first = plan_step(protocol, table, seed=0, count=protocol.batch.size, explain=explain)
                    second = plan_step(protocol, table, seed=100, count=protocol.batch.size,
                                       warm_start=first.hyperparameters(), explain=explain)
                    out[f"step {name} {n} runs explain {'on' if explain else 'off'}"] = (
                        f"{step_digest(first)} {step_digest(second)}")
    return out


def _space_digest(space, seed: int) -> str:
    import numpy as np

    chk = space.check()
    parts = [repr(chk.to_dict())]
    if not chk.empty:
        parts += [np.asarray(chk.ranges), np.asarray(chk.centre)]
        for what in (lambda: space.sample(50, rng=np.random.default_rng(seed)),
                     lambda: space.project(np.asarray(space.upper) + 0.3)):
            try:
                parts.append(np.asarray(what()))
            except Exception as exc:  # the same refusal counts as the same answer
                parts.append(repr(exc))
    return _digest(*parts)


def _random_spaces(rng, count: int):
    """Random polytopes: boxes with inequalities, some with a mixture total or discrete levels;
    flat and thin bands; and discrete levels of which no combination is feasible."""
    import numpy as np

    box = lambda d: (np.zeros(d), np.ones(d))
    for trial in range(count):
        d = int(rng.integers(1, 6))
        lower = rng.uniform(-1, 0, d)
        upper = lower + rng.uniform(0, 2, d)
        if rng.random() < 0.2:
            upper[0] = lower[0]
        m = int(rng.integers(0, 4))
        A_eq = b_eq = None
        if rng.random() < 0.3 and d > 1:
            A_eq, b_eq = np.ones((1, d)), [float(np.sum(lower) + rng.uniform(0, 1) * np.sum(upper - lower))]
        levels = {d - 1: np.sort(rng.uniform(lower[-1], upper[-1], 3))} if rng.random() < 0.3 else {}
        yield f"random {trial}", (lower, upper, A_eq, b_eq, rng.normal(size=(m, d)), rng.normal(size=m), levels)
    for trial in range(count // 5):
        d = int(rng.integers(2, 5))
        row = np.r_[1.0, 1.0, np.zeros(d - 2)]
        c = rng.uniform(0.3, 1.2)
        width = [0.0, 1e-7, 1e-3, 0.02][trial % 4]
        yield f"flat or thin {trial}", (*box(d), None, None, np.vstack([row, -row, rng.normal(size=(1, d))]),
                                        [c + width, -c, 2.0], {})
        levels = {0: np.array([0.0, 1.0]) if trial % 2 else np.array([0.0, 0.2, 1.0])}
        if trial % 3 == 0:
            levels[d - 1] = np.array([0.25])
        yield f"levels {trial}", (*box(d), None, None, np.vstack([row, np.r_[-1.0, np.zeros(d - 1)]]),
                                  [0.5, -rng.uniform(0.1, 0.4)], levels)


def spaces(count: int) -> dict:
    import numpy as np

    from guardband.planner.inputs.protocol import load_protocol
    from guardband.planner.simulation import get_problem
    from guardband.planner.space import DesignSpace

    warnings.simplefilter("ignore")
    out = {}
    for name in ("gramacy", "tablet", "dose", "coating"):
        out[f"space {name}"] = _space_digest(get_problem(name).protocol.design_space(), 1)
    for example in ("tablet_blend", "dose_combination"):
        out[f"space {example}"] = _space_digest(load_protocol(ROOT / "protocols" / f"{example}.toml").design_space(), 1)
    for k, (label, (lower, upper, A_eq, b_eq, A_ub, b_ub, levels)) in enumerate(
            _random_spaces(np.random.default_rng(123), count)):
        try:
            space = DesignSpace(tuple(f"x{i}" for i in range(len(lower))), lower, upper, A_eq, b_eq, A_ub, b_ub,
                                levels=levels)
            out[f"space {label}"] = _space_digest(space, k)
        except Exception as exc:
            out[f"space {label}"] = f"refused: {type(exc).__name__}: {exc}"
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reference", type=Path, required=False)
    ap.add_argument("--problems", nargs="+", default=["gramacy", "tablet", "dose", "coating"])
    ap.add_argument("--runs", type=int, nargs="+", default=[10, 25, 40])
    ap.add_argument("--spaces", type=int, default=150, help="random design spaces")
    ap.add_argument("--digests", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.digests:  # a worker: this process's code
        print(json.dumps({**spaces(args.spaces), **steps(args.problems, args.runs)}))
        return
    if args.reference is None:
        ap.error("--reference DIR is required")
    cmd = [sys.executable, str(Path(__file__).resolve()), "--digests", "--problems", *args.problems,
           "--runs", *map(str, args.runs), "--spaces", str(args.spaces)]
    got = {}
    for label, root in (("reference", import_root(args.reference)), ("this tree", None)):
        out = subprocess.run(cmd, check=True, capture_output=True, text=True, env=environment(root),
                             cwd=root or ROOT).stdout
        got[label] = json.loads(out.strip().splitlines()[-1])
    differ = [k for k in got["reference"] if got["reference"][k] != got["this tree"].get(k)]
    for k in differ:
        print(f"DIFFERS: {k}: reference {got['reference'][k]}, this tree {got['this tree'].get(k)}")
    print(f"{len(got['reference']) - len(differ)} of {len(got['reference'])} answers the same, bit for bit")
    sys.exit(1 if differ else 0)


if __name__ == "__main__":
    main()
