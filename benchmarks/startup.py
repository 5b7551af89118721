"""Start-up cost of the command line: `check`, the imports `plan` needs, and the bare command.

Each case runs as a fresh process N times (default 7); the minimum and the
median wall times are printed. The minimum is the fairer figure on a
shared machine (other jobs only ever add time).

    python benchmarks/startup.py [--repeat 7] [--out benchmarks/results/startup.csv]
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
TABLET = ROOT / "protocols" / "tablet_blend.toml"

CASES = {
    "python alone": [sys.executable, "-c", "pass"],
    "guardband --help (the command line's imports)": [sys.executable, "-m", "guardband.planner.cli", "--help"],
    "imports of plan (workflow, step, report)": [
        sys.executable, "-c",
        "import guardband.planner.cli, guardband.planner.app.workflow, guardband.planner.step, "
        "guardband.planner.report.folder"],
    "guardband check tablet_blend.toml": [sys.executable, "-m", "guardband.planner.cli", "check", str(TABLET)],
    # what `check` cost while the limit model imported scipy.stats (before the change)
    "check, scipy.stats imported first (as before)": [
        sys.executable, "-c",
        "import sys, scipy.stats; from guardband.planner.cli import main; "
        f"sys.argv = ['guardband', 'check', {str(TABLET)!r}]; main()"],
}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=7)
    ap.add_argument("--out", type=Path, default=None)
    args = ap.parse_args()
    rows = []
    times: dict = {name: [] for name in CASES}
    for _ in range(args.repeat):  # the cases interleaved, so that a change of load hits them alike
        for name, cmd in CASES.items():
            t = time.perf_counter()
            subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, cwd=ROOT)
            times[name].append(time.perf_counter() - t)
    for name, ts in times.items():
        rows.append((name, min(ts), statistics.median(ts)))
        print(f"{name:50s} min {min(ts):6.3f} s   median {statistics.median(ts):6.3f} s", flush=True)
    if args.out:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text("case,min_s,median_s\n" + "".join(f"{n},{a:.4f},{b:.4f}\n" for n, a, b in rows),
                            encoding="utf-8")


if __name__ == "__main__":
    main()
