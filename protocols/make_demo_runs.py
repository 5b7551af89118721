"""Make the invented demo runs files beside the example protocols.

The "lab" here is a pair of made-up smooth response functions plus
Gaussian measurement noise; nothing is taken from real measurements.
Run from the repository root:  python protocols/make_demo_runs.py
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from guardband.planner.space import starting_design  # noqa: E402
from guardband.planner.app.fileio import write_csv_text  # noqa: E402
from guardband.planner.inputs.protocol import load_protocol  # noqa: E402


def tablet_truth(x: dict) -> dict:
    """Invented responses of the tablet blend (fractions, force in kN)."""
    dis = (58 + 520 * x["croscarmellose"] - 230 * x["povidone"] - 1300 * x["mg_stearate"]
           + 18 * x["lactose"] - 1.1 * (x["force"] - 6) - 0.04 * (x["force"] - 12) ** 2)
    deg = 0.035 + 1.9 * x["povidone"] + 0.9 * x["croscarmellose"] + 0.003 * (x["force"] - 6)
    fri = 0.1 + 1.6 * np.exp(-0.09 * (x["force"] - 6) - 9 * x["povidone"] - 0.6 * x["mcc"]
                             + 10 * x["mg_stearate"])
    return {"dissolution_30min": dis, "degradant_b": deg, "friability": fri}


def dose_truth(x: dict) -> dict:
    """Invented responses of the two-agent study (doses in mg/kg)."""
    a, b = x["dose_a"], x["dose_b"]
    resp = 10 + 55 * (1 - np.exp(-a / 25)) + 30 * (1 - np.exp(-b / 3)) + 0.15 * a * b / 8
    logit = -4.2 + 0.045 * a + 0.32 * b + 0.004 * a * b
    return {"response_score": resp, "dlt_rate": 1 / (1 + np.exp(-logit))}


def make(protocol_file: str, runs_file: str, n: int, truth, noise: dict, seed: int, *,
         cohort: int | None = None) -> None:
    p = load_protocol(HERE / protocol_file)
    rng = np.random.default_rng(seed)
    space = p.design_space()
    region = p.start_rows()
    mixture = [k for k, f in enumerate(p.factors) if f.kind == "component"] or None
    X, _ = starting_design(space, n, rng=rng, mixture_indices=mixture,
                           region=None if region is None else region[:2])
    header = ["run_id", *p.factor_names, *p.runs_columns, "notes"]
    binomial = {lim.name for lim in p.limits if lim.kind == "binomial"}
    rows = []
    for i, x in enumerate(X, start=1):
        xd = dict(zip(p.factor_names, x))
        y = truth(xd)
        cells = []
        for r in p.response_names:
            v = y[r] + rng.normal(0, noise[r])
            if r in binomial:  # a toxicity rate is observed as events among a cohort
                cells += [int(rng.binomial(cohort, min(max(y[r], 0), 1))), cohort]
            else:
                cells.append(round(float(v), 4))
        rows.append([f"R{i:02d}", *[round(float(v), 5) for v in x], *cells, "invented demo run"])
    text = write_csv_text(rows, header, float_format=".6g")
    (HERE / runs_file).write_text(text, encoding="utf-8")
    print(f"wrote {runs_file}: {len(rows)} runs")


if __name__ == "__main__":
    make("tablet_blend.toml", "tablet_blend_runs.csv", 14, tablet_truth,
         {"dissolution_30min": 2.0, "degradant_b": 0.008, "friability": 0.05}, seed=11)
    make("dose_combination.toml", "dose_combination_runs.csv", 6, dose_truth,
         {"response_score": 3.0, "dlt_rate": 0.0}, seed=5, cohort=6)
