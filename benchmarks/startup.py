"""Start-up cost of the command line: `check`, what `plan` does before its step, and the bare command.

Each case runs as a fresh process N times (default 7), the cases interleaved
so that a change of load hits them alike; the minimum and the median wall
times are printed. The minimum is the fairer figure on a shared machine
(other jobs only ever add time).

Cases:

- ``python alone``: the interpreter's own start;
- ``guardband --help``: the command line's imports;
- ``check tablet_blend.toml`` and ``check dose_combination.toml`` (discrete
  doses: its mixed-integer level check is a cvxpy problem);
- ``plan's start-up``: everything ``guardband plan`` does on the tablet
  example before its planning step (the imports, the protocol, the runs
  file, the design space's check), the step's own modules imported too;
- ``plan tablet_blend``: the whole command (start-up, one planning step,
  its files and the decision log, in a new folder);
- ``imports of plan --report``: the command line, the workflow, the step and
  the report modules.

With ``--reference DIR`` (a checkout to compare with; see
``reference_tree.py``) every case also runs on that checkout's code, in the
same rounds, and the ratio of the medians is printed.

    python benchmarks/startup.py [--repeat 7] [--reference DIR] [--out benchmarks/results/startup.csv]
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import time
from pathlib import Path

from reference_tree import environment, import_root

ROOT = Path(__file__).resolve().parents[1]
TABLET = ROOT / "protocols" / "tablet_blend.toml"
TABLET_RUNS = ROOT / "protocols" / "tablet_blend_runs.csv"
DOSE = ROOT / "protocols" / "dose_combination.toml"


def _cli(*args: str) -> list[str]:
    code = f"import sys; from guardband.planner.cli import main; sys.argv = ['guardband', *{list(args)!r}]; main()"
    return [sys.executable, "-c", code]


# what `plan` does before its step (app/workflow.py, run_plan), with names both trees have
PLAN_START = (
    "import os, guardband.planner.cli\n"
    # as main() does before any command (a tree without the setting sets nothing)
    "os.environ.setdefault(*getattr(guardband.planner.cli, 'NO_PYDANTIC_PLUGINS', ('GUARDBAND_UNUSED', '')))\n"
    "import guardband.planner.app.workflow\n"
    "from guardband.planner.inputs.protocol import load_protocol\n"
    "from guardband.planner.inputs.runs import read_runs\n"
    "import guardband.planner.step.plan, guardband.planner.models\n"
    f"protocol = load_protocol({str(TABLET)!r})\n"
    f"runs = read_runs({str(TABLET_RUNS)!r}, protocol)\n"
    "assert not protocol.design_space().check().empty\n"
)

CASES = {
    "python alone": [sys.executable, "-c", "pass"],
    "guardband --help (the command line's imports)": _cli("--help"),
    "guardband check tablet_blend.toml": _cli("check", str(TABLET)),
    "guardband check dose_combination.toml": _cli("check", str(DOSE)),
    "plan's start-up (all but the step, tablet)": [sys.executable, "-c", PLAN_START],
    "guardband plan tablet_blend (the whole command)": [
        sys.executable, "-c",
        "import sys, tempfile; from guardband.planner.cli import main; "
        f"sys.argv = ['guardband', 'plan', {str(TABLET)!r}, {str(TABLET_RUNS)!r}, '--out', "
        "tempfile.mkdtemp() + '/campaign']; main()"],
    "imports of plan --report (workflow, step, report)": [
        sys.executable, "-c",
        "import guardband.planner.cli, guardband.planner.app.workflow, guardband.planner.step.plan, "
        "guardband.planner.report.folder"],
}


def _time(cmd, env, cwd) -> float:
    t = time.perf_counter()
    subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env, cwd=cwd)
    return time.perf_counter() - t


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=7)
    ap.add_argument("--reference", type=Path, default=None, help="a checkout to compare with, side by side")
    ap.add_argument("--out", type=Path, default=None)
    args = ap.parse_args()
    trees = {"this tree": (environment(None), ROOT)}
    if args.reference is not None:
        ref = import_root(args.reference)
        trees = {"reference": (environment(ref), ref), **trees}
    times = {(tree, name): [] for tree in trees for name in CASES}
    for r in range(args.repeat):  # the cases and the trees interleaved
        for name, cmd in CASES.items():
            for tree in (list(trees) if r % 2 else list(trees)[::-1]):
                times[(tree, name)].append(_time(cmd, *trees[tree]))
    rows = []
    for name in CASES:
        cells, meds = [], {}
        for tree in trees:
            ts = times[(tree, name)]
            meds[tree] = statistics.median(ts)
            rows.append((name, tree, min(ts), meds[tree]))
            cells.append(f"{tree}: min {min(ts):6.3f} s median {meds[tree]:6.3f} s")
        ratio = f"  ratio {meds['this tree'] / meds['reference']:.2f}" if len(trees) == 2 else ""
        print(f"{name:52s} " + " | ".join(cells) + ratio, flush=True)
    if args.out:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text("case,tree,min_s,median_s\n" + "".join(f"{n},{t},{a:.4f},{b:.4f}\n" for n, t, a, b in rows),
                            encoding="utf-8")


if __name__ == "__main__":
    main()
