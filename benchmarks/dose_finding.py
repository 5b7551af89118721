"""Operating characteristics of single-agent dose finding: Guardband against the trade's references.

Simulated trials, invented scenarios: six dose levels, a target toxicity
rate of 0.25, cohorts of three, 30 subjects (10 cohorts) at most, starting
at the lowest level. Each scenario gives the true probability of a
dose-limiting toxicity at each level; its true MTD is the highest level
whose rate is at most the target (none when the lowest level is above it).

Designs, all written here:

* ``3+3`` (trade practice; as described by Storer 1989, Biometrics 45:925-937,
  from memory): three subjects per level; 0 of 3 escalates; 1 of 3 adds three
  more, and at most 1 of 6 escalates; 2 or more events stop escalation, and
  the level below is filled to six if it holds only three. The selected dose
  is the highest level with at most 1 of 6 events among six treated.
* ``CRM``: the one-parameter power model of O'Quigley, Pepe & Fisher (1990,
  Biometrics 46:33-48): P(toxicity at level i) = s_i ** exp(a), with the
  skeleton s below (invented for this benchmark, its guess of the MTD at
  level 3) and a ~ N(0, 1.34) (a prior variance common in the literature,
  from memory). The posterior of a is computed on a grid. Each cohort goes
  to the level whose posterior mean rate is nearest the target, never more
  than one level above the highest level tried (no skipping); after the last
  cohort the selected dose is the level nearest the target.
* ``Guardband``: the planner itself (``plan_step``) on a one-factor dose
  protocol: a binomial limit "rate <= 0.25" that must hold with probability
  p (the screen threshold, also p), monotone, no skipping of untried levels,
  the dose itself as the objective to maximise (ranking by the mean), one
  cohort per step. Each subject is a row of the runs table (events 0 or 1
  of 1 subject; the binomial model treats the rows of one level like one
  cohort). The trial stops when no level passes the screen (no dose
  selected); otherwise the selected dose is the level the planner would
  give the next cohort after the last one. p = 0.75 matches the overdose
  control of escalation with overdose control (P(rate above target) <= 0.25;
  Babb, Rogatko & Zacks 1998, from memory); p = 0.5 asks only that the
  posterior median rate be within the target, like an MTD-seeking design.
  By default a dose whose subjects' rate exceeds the target excludes every
  dose at or above it at once (one event in a cohort of three does); the
  variants "/6" let a dose break the limit only once six subjects were
  treated there (``broken_after = 6``), as the 3+3 design judges a level.

Figures per scenario and design: the share of trials selecting the true
MTD, the share selecting a level above it, the share of subjects treated
above it, events (toxicities) per trial and subjects per trial.

Run:  python benchmarks/dose_finding.py [--trials 1000] [--guardband-trials 16]
          [--variants 0.75 0.75/6 0.5/6] [--workers 2] [--seed 1] [--out benchmarks/results/dose_finding.csv]
"""

from __future__ import annotations

import argparse
import csv
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from guardband.planner.inputs.protocol import parse_protocol  # noqa: E402
from guardband.planner.inputs.runs import parse_runs_text  # noqa: E402
from guardband.planner.simulation.runner import run_in_workers  # noqa: E402
from guardband.planner.step import plan_step  # noqa: E402

TARGET = 0.25
COHORT = 3
MAX_SUBJECTS = 30
LEVELS = 6
#: Invented scenarios: true toxicity rate at each level.
SCENARIOS = {
    "MTD at 1": [0.25, 0.40, 0.50, 0.60, 0.70, 0.80],
    "MTD at 2": [0.10, 0.25, 0.40, 0.50, 0.60, 0.70],
    "MTD at 3": [0.05, 0.10, 0.25, 0.40, 0.55, 0.65],
    "MTD at 4": [0.02, 0.05, 0.10, 0.25, 0.40, 0.55],
    "MTD at 5": [0.01, 0.03, 0.06, 0.12, 0.25, 0.40],
    "MTD at 6": [0.01, 0.02, 0.04, 0.08, 0.14, 0.25],
    "flat, all safe": [0.03, 0.04, 0.05, 0.06, 0.07, 0.08],
    "steep after 3": [0.02, 0.04, 0.08, 0.50, 0.70, 0.90],
}
SKELETON = np.array([0.05, 0.11, 0.25, 0.38, 0.50, 0.60])
PRIOR_VAR = 1.34
GRID = np.linspace(-6.0, 6.0, 2401)


def true_mtd(rates) -> int | None:
    """The highest level (1-based) whose true rate is at most the target, or None."""
    ok = [i + 1 for i, r in enumerate(rates) if r <= TARGET + 1e-12]
    return max(ok) if ok else None


# --------------------------------------------------------------------------- 3+3
def three_plus_three(rates, rng):
    """One 3+3 trial: (levels given, one per subject; events per subject; selected level or None)."""
    n = np.zeros(LEVELS, int)
    e = np.zeros(LEVELS, int)
    given, events = [], []

    def treat(level):
        x = rng.random(COHORT) < rates[level - 1]
        n[level - 1] += COHORT
        e[level - 1] += int(x.sum())
        given.extend([level] * COHORT)
        events.extend(x.astype(int).tolist())

    def settle_below(level):  # too toxic at level: fill the levels below to six until one holds
        below = level - 1
        while below >= 1:
            if n[below - 1] < 6:
                treat(below)
            if e[below - 1] <= 1:
                return below
            below -= 1
        return None

    level = 1
    while True:
        treat(level)
        i = level - 1
        if n[i] == 3 and e[i] == 1:
            treat(level)
        if e[i] < 2 and level == LEVELS and n[i] < 6:
            treat(level)  # the top level is declared only with six treated
        if e[i] >= 2:
            return given, events, settle_below(level)
        if level == LEVELS:
            return given, events, level
        level += 1


# --------------------------------------------------------------------------- CRM
def crm_posterior_means(n, e):
    """Posterior mean rate at every level under the power model (grid integration)."""
    a = GRID[:, None]
    p = np.clip(SKELETON[None, :] ** np.exp(a), 1e-300, 1.0 - 1e-16)
    log_lik = np.sum(e * np.log(p) + (n - e) * np.log1p(-p), axis=1)
    log_post = log_lik - 0.5 * GRID**2 / PRIOR_VAR
    w = np.exp(log_post - log_post.max())
    w /= w.sum()
    return w @ p


def crm(rates, rng):
    n = np.zeros(LEVELS)
    e = np.zeros(LEVELS)
    given, events = [], []
    level, tried = 1, 1
    for _ in range(MAX_SUBJECTS // COHORT):
        x = rng.random(COHORT) < rates[level - 1]
        n[level - 1] += COHORT
        e[level - 1] += x.sum()
        given.extend([level] * COHORT)
        events.extend(x.astype(int).tolist())
        tried = max(tried, level)
        means = crm_posterior_means(n, e)
        best = int(np.argmin(np.abs(means - TARGET))) + 1
        level = min(best, tried + 1)
    means = crm_posterior_means(n, e)
    return given, events, int(np.argmin(np.abs(means - TARGET))) + 1


# --------------------------------------------------------------------------- Guardband
def guardband_protocol(threshold: float, broken_after: int | None):
    return parse_protocol({
        "study": {"title": "single-agent dose finding (benchmark)", "version": "1", "author": "benchmark",
                  "kind": "dose"},
        "factors": [{"name": "level", "kind": "discrete", "levels": list(range(1, LEVELS + 1))}],
        "objective": {"name": "dose_given", "direction": "maximize"},
        "limits": [{"name": "dlt", "kind": "binomial", "events": "dlt_events", "subjects": "subjects",
                    "upper": TARGET, "probability": threshold, "broken_after": broken_after}],
        "screen": {"threshold": threshold, "min_runs": 1, "span_reach": None},
        "escalation": {"no_skipping": True, "cohort_size": COHORT},
        "ranking": {"rule": "mean"},
        "batch": {"size": 1, "pool": 50, "refine": 0},
        "model": {"restarts": 2},
    })


def _runs_text(given, events) -> str:
    rows = [f"S{k + 1},{g},{g},{x},1" for k, (g, x) in enumerate(zip(given, events))]
    return "run_id,level,dose_given,dlt_events,subjects\n" + "\n".join(rows) + "\n"


def _next_level(protocol, given, events, seed) -> int | None:
    result = plan_step(protocol, parse_runs_text(_runs_text(given, events), protocol), seed=seed)
    return int(round(result.proposals[0].x[0])) if result.proposals else None


def guardband_trial(job):
    rates, (threshold, broken_after), seed = job
    protocol = guardband_protocol(threshold, broken_after)
    rng = np.random.default_rng(seed)
    given, events = [], []
    level = 1
    for c in range(MAX_SUBJECTS // COHORT):
        x = rng.random(COHORT) < rates[level - 1]
        given.extend([level] * COHORT)
        events.extend(x.astype(int).tolist())
        level = _next_level(protocol, given, events, seed * 1000 + c)
        if level is None:
            break
    return given, events, level


# --------------------------------------------------------------------------- figures
def summarise(design, scenario, rates, trials):
    mtd = true_mtd(rates)
    top = LEVELS if mtd is None else mtd
    sel = [t[2] for t in trials]
    right = np.mean([s == mtd for s in sel])
    above = np.mean([s is not None and (mtd is None or s > mtd) for s in sel])
    none = np.mean([s is None for s in sel])
    subjects = np.array([len(t[0]) for t in trials], float)
    treated_above = np.array([np.sum(np.asarray(t[0]) > (0 if mtd is None else top)) for t in trials], float)
    events = np.array([np.sum(t[1]) for t in trials], float)
    return {"scenario": scenario, "design": design, "trials": len(trials), "true_mtd": mtd if mtd else "none",
            "select_mtd": round(float(right), 3), "select_above": round(float(above), 3),
            "select_none": round(float(none), 3),
            "treated_above": round(float(treated_above.sum() / subjects.sum()), 3),
            "events_per_trial": round(float(events.mean()), 2),
            "subjects_per_trial": round(float(subjects.mean()), 1)}


def _variant(text: str) -> tuple[float, int | None]:
    p, _, n = text.partition("/")
    return float(p), (int(n) if n else None)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--trials", type=int, default=1000, help="trials per scenario for 3+3 and CRM")
    ap.add_argument("--guardband-trials", type=int, default=16, help="trials per scenario and variant")
    ap.add_argument("--variants", nargs="+", default=["0.75", "0.75/6", "0.5/6"],
                    help="Guardband settings as p or p/n: the screen threshold p, and broken_after n "
                         "(a dose breaks the limit only once n subjects were treated there; default 1)")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--out", default="benchmarks/results/dose_finding.csv")
    args = ap.parse_args(argv)
    start = time.time()
    rows = []
    for k, (name, rates) in enumerate(SCENARIOS.items()):
        rng = np.random.default_rng([args.seed, k])
        rows.append(summarise("3+3", name, rates, [three_plus_three(rates, rng) for _ in range(args.trials)]))
        rng = np.random.default_rng([args.seed, k, 1])
        rows.append(summarise("CRM", name, rates, [crm(rates, rng) for _ in range(args.trials)]))
    variants = [_variant(v) for v in args.variants]
    jobs = [(rates, v, args.seed * 100_000 + 1000 * k + i)
            for v in variants for k, rates in enumerate(SCENARIOS.values())
            for i in range(args.guardband_trials)]
    results = run_in_workers(guardband_trial, jobs, workers=args.workers)
    at = 0
    for t, n in variants:
        for name, rates in SCENARIOS.items():
            label = f"Guardband p={t:g}" + (f", broken after {n}" if n else "")
            rows.append(summarise(label, name, rates, results[at:at + args.guardband_trials]))
            at += args.guardband_trials
    rows.sort(key=lambda r: (list(SCENARIOS).index(r["scenario"]), r["design"]))
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    with out.open("w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    print("| scenario | design | trials | true MTD | selects MTD | selects above | none | treated above | "
          "events/trial | subjects/trial |")
    print("|---|---|---:|---:|---:|---:|---:|---:|---:|---:|")
    for r in rows:
        print("| " + " | ".join(str(v) for v in r.values()) + " |")
    print(f"\nwrote {out}; {time.time() - start:.0f} s")


if __name__ == "__main__":
    main()
