"""Two calibration runs side by side, on the problems both ran.

Reads two ``*_runs.csv`` / ``*_campaigns.csv`` pairs written by
``benchmarks/calibration.py`` and prints, for each batch size and threshold,
the share of planned runs that broke a limit by their true values (exact
binomial 95% interval, Clopper & Pearson 1934), the same for problems with a
steep sigmoid limit, the median gap (% of the objective's range) and the
campaigns that stalled, restricted to the problem indices both runs hold.

Run:  python benchmarks/calibration_compare.py BEFORE_runs.csv AFTER_runs.csv
"""

from __future__ import annotations

import csv
import sys
from collections import defaultdict

import numpy as np
from scipy.stats import binomtest


def _load(path: str) -> list[dict]:
    with open(path, newline="") as f:
        return list(csv.DictReader(line for line in f if not line.startswith("#")))


def _share(k: int, m: int) -> str:
    if m == 0:
        return "-"
    ci = binomtest(k, m).proportion_ci(method="exact")
    return f"{100 * k / m:.1f}% [{100 * ci.low:.1f}, {100 * ci.high:.1f}] ({k}/{m})"


def _table(label: str, runs: list[dict], campaigns: list[dict]) -> list[str]:
    groups = defaultdict(list)
    for r in runs:
        groups[(int(r["batch"]), float(r["threshold"]))].append(r)
    out = []
    for (batch, thr), rows in sorted(groups.items()):
        broke = sum(r["met_true"] == "False" for r in rows)
        sig = [r for r in rows if "sigmoid" in r["shapes"]]
        sig_broke = sum(r["met_true"] == "False" for r in sig)
        camp = [c for c in campaigns if int(c["batch"]) == batch and float(c["threshold"]) == thr]
        gaps = [float(c["gap_pct"]) for c in camp if c["gap_pct"] not in ("", "nan")]
        stalled = sum(c["stalled"] == "True" for c in camp)
        out.append(f"| {label} | {batch} | {thr:g} | {_share(broke, len(rows))} | {_share(sig_broke, len(sig))} | "
                   f"{np.median(gaps):.2f} | {stalled}/{len(camp)} |")
    return out


def main(before: str, after: str) -> None:
    pairs = [(p, _load(p), _load(p.replace("_runs", "_campaigns"))) for p in (before, after)]
    common = set.intersection(*({r["index"] for r in runs} for _, runs, _ in pairs))
    print(f"{len(common)} problems in both runs\n")
    print("| run | batch | threshold | broke a limit [95% CI] | sigmoid limits | median gap (%) | stalled |")
    print("|---|---:|---:|---|---|---:|---:|")
    for path, runs, campaigns in pairs:
        label = path.rsplit("/", 1)[-1].replace("_runs.csv", "")
        keep = lambda rows: [r for r in rows if r["index"] in common]
        print("\n".join(_table(label, keep(runs), keep(campaigns))))


if __name__ == "__main__":
    if len(sys.argv) != 3:
        sys.exit(__doc__)
    main(sys.argv[1], sys.argv[2])
