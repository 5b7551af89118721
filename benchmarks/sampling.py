"""Candidate sampling speed: hit-and-run versus rejection from the box.

The space is a 10-component mixture (total 1) in which every component lives
in a narrow band (default 0.03 wide) and the lower bounds sum to 0.9, so the
mixture plane cuts a thin slab out of the box; two ratio limits cut it
further. Hit-and-run draws the requested number of candidates; rejection
sampling then gets the same wall time.

Rejection needs a tolerance for the equality: a point drawn in the 10-D box
meets ``sum == 1`` with probability zero. So rejection draws the first nine
components uniformly in their bands, sets the tenth to 1 minus their sum
(the equality then holds to rounding) and rejects the point unless the tenth
lies in its band and both ratio limits hold. Accepted points are uniform on
the polytope, like hit-and-run's. A second rejection row shows the naive
10-D box with a loose |sum - 1| <= 1e-3, for scale.

The KS lines compare marginals with exact uniform points (rejection, given
more time): points of one chain are correlated (thinning of 5 steps), so the
default pool passes less easily than independent chains do.

Run:  python benchmarks/sampling.py [--n 100000] [--bands 0.03 0.05] [--repeats 3]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
from scipy import stats

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from guardband.planner.space import DesignSpace  # noqa: E402

LOWER = np.array([0.30, 0.20, 0.10, 0.08, 0.06, 0.05, 0.04, 0.03, 0.02, 0.02])


def build_space(band: float) -> DesignSpace:
    A_ub = np.zeros((2, 10))
    A_ub[0, [0, 1]] = [-1.0, 1.4]  # c1 >= 1.4 c2
    A_ub[1, [2, 3]] = [-1.0, 1.0]  # c4 <= c3
    return DesignSpace(
        tuple(f"c{i + 1}" for i in range(10)), LOWER, LOWER + band,
        A_eq=np.ones((1, 10)), b_eq=[1.0], A_ub=A_ub, b_ub=[0.0, 0.0],
        eq_labels=("mixture total",), ub_labels=("c1 >= 1.4 c2", "c4 <= c3"),
    )


def rejection(space: DesignSpace, seconds: float, rng, *, full_box: bool,
              batch: int = 200_000) -> tuple[np.ndarray, int, float]:
    """Rejection sampling for ``seconds`` of wall time; (accepted points, drawn, time)."""
    lo, hi = space.lower, space.upper
    kept, drawn = [], 0
    start = time.perf_counter()
    while time.perf_counter() - start < seconds:
        X = rng.uniform(lo, hi, size=(batch, 10))
        if full_box:
            ok = np.abs(X.sum(axis=1) - 1.0) <= 1e-3
        else:
            X[:, 9] = 1.0 - X[:, :9].sum(axis=1)
            ok = (X[:, 9] >= lo[9]) & (X[:, 9] <= hi[9])
        ok &= np.all(X @ space.A_ub.T <= space.b_ub, axis=1)
        kept.append(X[ok])
        drawn += batch
    elapsed = time.perf_counter() - start
    return np.vstack(kept), drawn, elapsed


def run(band: float, n: int, repeats: int, seed: int, reference_seconds: float) -> None:
    t0 = time.perf_counter()
    space = build_space(band)
    chk = space.check()
    setup = time.perf_counter() - t0
    if chk.empty:
        raise SystemExit(f"error: {chk.message}")
    times = []
    for r in range(repeats):
        t0 = time.perf_counter()
        X = space.sample(n, rng=seed + r)
        times.append(time.perf_counter() - t0)
    inside = bool(space.contains(X).all())
    budget = float(np.median(times))
    rng = np.random.default_rng(seed)
    R, drawn, t_rej = rejection(space, budget, rng, full_box=False)
    B, drawn_b, t_box = rejection(space, budget, rng, full_box=True)

    print(f"== band {band:g}: lower bounds sum to {LOWER.sum():g}, uppers to "
          f"{LOWER.sum() + 10 * band:g}; {chk.message}")
    print(f"setup (LP checks, ranges, centre), once per space: {setup:.3f} s")
    print(f"hit-and-run, {n} points, {repeats} repeats: "
          + ", ".join(f"{t:.3f}" for t in times) + f" s; first call with setup "
          f"{setup + times[0]:.3f} s; all inside to 1e-9: {inside}")
    header = (f"{'method':<42}{'time s':>8}{'drawn':>11}{'accepted':>10}"
              f"{'accept %':>10}{'points/s':>11}")
    print(header)
    print("-" * len(header))
    print(f"{'hit-and-run (median run)':<42}{budget:>8.3f}{n:>11d}{n:>10d}"
          f"{100.0:>10.1f}{n / budget:>11.0f}")
    for label, pts, n_drawn, t in (
        ("rejection: 9 in box, 10th = 1 - sum", R, drawn, t_rej),
        ("rejection: 10-D box, |sum - 1| <= 1e-3", B, drawn_b, t_box),
    ):
        print(f"{label:<42}{t:>8.3f}{n_drawn:>11d}{pts.shape[0]:>10d}"
              f"{100.0 * pts.shape[0] / n_drawn:>10.4f}{pts.shape[0] / t:>11.0f}")
    if R.shape[0]:
        print(f"rejection (9 + 1) would need about {n * t_rej / R.shape[0]:.1f} s for {n} points")
    else:
        print("rejection (9 + 1) accepted nothing in that time")

    # Quality: marginals against exact uniform points from a longer rejection run.
    if reference_seconds > 0:
        ref, _, _ = rejection(space, reference_seconds, np.random.default_rng(seed + 99),
                              full_box=False)
        m = min(20_000, ref.shape[0])
        if m >= 1000:
            t0 = time.perf_counter()
            ind = space.sample(m, rng=seed + 7, n_chains=m)
            t_ind = time.perf_counter() - t0
            for label, pts in ((f"default pool (first {m} of the {n})", X[:m]),
                               (f"{m} independent chains ({t_ind:.2f} s)", ind)):
                p = [stats.ks_2samp(pts[:, j], ref[:m, j]).pvalue for j in range(10)]
                print(f"KS two-sample vs {m} rejection points, {label}: "
                      f"smallest p over 10 components {min(p):.3g}")
    print()


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--n", type=int, default=100_000, help="candidates to draw")
    parser.add_argument("--bands", type=float, nargs="+", default=[0.03, 0.05],
                        help="width of each component's band (one table per width)")
    parser.add_argument("--repeats", type=int, default=3, help="timed sampling repeats")
    parser.add_argument("--reference-seconds", type=float, default=3.0,
                        help="rejection time spent on reference points for the KS check (0: skip)")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args(argv)
    for band in args.bands:
        run(band, args.n, args.repeats, args.seed, args.reference_seconds)


if __name__ == "__main__":
    main()
