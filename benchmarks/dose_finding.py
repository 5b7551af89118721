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

Two agents (``--two-agents``): the dose example itself
(``protocols/dose_combination.toml``, as written: two agents on their dose
strengths, a DLT-rate limit of 0.25 at probability 0.9, cohorts of six,
three cohorts per step, no skipping, a forbidden corner) simulated under the
three invented truths of ``protocols/scenarios/dose_combination_scenarios.toml``
by the simulator (DLTs ~ Binomial(6, true rate) per cohort). Each campaign
starts with ``--start`` cohorts in the starting region and plans ``--budget``
more; the combination selected is the one a last planning step would give
the next cohort (none when nothing passes the screen). The true MTD contour
is every admissible combination whose true rate is at most 0.25 and that
cannot go one level up in either agent without passing it. The reference
is trade practice written here: the 3+3 design (cohorts of three, as above)
along a fixed path that raises one agent by one level at a time, PATH below.
Figures: the share of trials selecting a combination on the contour, above
it (true rate above 0.25), below it, or none; the share of subjects treated
above 0.25; DLTs and subjects per trial.

Run:  python benchmarks/dose_finding.py --two-agents [--trials 1000] [--guardband-trials 100]
          [--start 4] [--budget 9 15] [--pool 1000] [--workers 2]
"""

from __future__ import annotations

import argparse
import csv
import time
from pathlib import Path

import numpy as np


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
    """One 3+3 trial over the levels of ``rates`` (1-based, in order of escalation): (levels given, one
    per subject; events per subject; selected level or None)."""
    top = len(rates)
    n = np.zeros(top, int)
    e = np.zeros(top, int)
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
        if e[i] < 2 and level == top and n[i] < 6:
            treat(level)  # the top level is declared only with six treated
        if e[i] >= 2:
            return given, events, settle_below(level)
        if level == top:
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


# --------------------------------------------------------------------------- two agents
ROOT = Path(__file__).resolve().parents[1]
DOSE_PROTOCOL = ROOT / "protocols" / "dose_combination.toml"
DOSE_SCENARIOS = ROOT / "protocols" / "scenarios" / "dose_combination_scenarios.toml"
#: The trade-practice reference's fixed path through the dose example's combinations (dose_a, dose_b
#: in mg/kg): one agent up one level at a time, alternating, from the starting doses (invented here).
PATH = [(5, 1), (10, 1), (10, 2), (20, 2), (20, 4), (40, 4), (80, 4)]


def dose_example():
    """The dose example protocol and its scenarios (their truths: response score and DLT rate)."""
    from guardband.planner.inputs.protocol import load_protocol
    from guardband.planner.simulation.scenarios import load_scenarios

    protocol = load_protocol(DOSE_PROTOCOL)
    return protocol, load_scenarios(DOSE_SCENARIOS, protocol)


def admissible(protocol) -> np.ndarray:
    """Every level combination a cohort may get: inside the design space and outside every forbidden region."""
    from guardband.planner.simulation.problems import _discrete_grid
    from guardband.safety.limits import ScreenRules
    from guardband.safety.screen import forbidden_mask

    G = _discrete_grid(protocol.design_space())
    return G[~forbidden_mask(ScreenRules.from_protocol(protocol).forbidden, G)[0]]


def mtd_contour(protocol, G, rate) -> set:
    """The true MTD contour: admissible combinations whose true rate is at most the limit and that
    cannot go one level up in either agent (to an admissible combination) without passing it."""
    upper = protocol.limits[0].upper
    at = {tuple(g): r for g, r in zip(G.tolist(), rate)}
    levels = [list(f.levels) for f in protocol.factors]
    out = set()
    for g, r in at.items():
        if r > upper:
            continue
        ups = []
        for j in range(2):
            k = levels[j].index(g[j])
            if k + 1 < len(levels[j]):
                h = list(g)
                h[j] = levels[j][k + 1]
                ups.append(tuple(h))
        if all(at.get(h, np.inf) > upper for h in ups):
            out.add(g)
    return out


def path_trial(path_rates, rng):
    """One 3+3 trial along PATH: (combinations given, one per subject; events; selected or None)."""
    given, events, sel = three_plus_three(path_rates, rng)
    return [PATH[k - 1] for k in given], events, (PATH[sel - 1] if sel else None)


def two_agent_trial(job):
    """One Guardband campaign on the dose example under a scenario: start cohorts, planned cohorts,
    then the combination a last step would give next (None when nothing passes the screen)."""
    from guardband.planner.simulation.loop import run_campaign, runs_table_from_arrays

    k, seed, n_start, budget, pool = job
    protocol, found = dose_example()
    problem = found.scenarios[k].problem
    h = run_campaign(protocol, problem.evaluate, n_start=n_start, budget=budget, seed=seed,
                     measure=problem.measure, pool_size=pool, cohort=problem.cohort)
    m = problem.cohort["dlt_rate"]
    selected = None
    if not h.stalled:
        runs = runs_table_from_arrays(protocol, h.X, h.Y, cohort=problem.cohort)
        result = plan_step(protocol, runs, seed=seed + 1, count=1, pool_size=pool, explain=False)
        selected = tuple(float(v) for v in result.proposals[0].x) if result.proposals else None
    given = [tuple(float(v) for v in x) for x in h.X for _ in range(m)]
    events = [int(round(y * m)) for y in h.Y["dlt_rate"]]
    return given, events, selected


def summarise_two(design, scenario, at, contour, upper, trials):
    """Shares of trials selecting on / above / below the contour or none; subjects above; events; subjects."""
    sel = [t[2] for t in trials]
    above = lambda g: at[tuple(float(v) for v in g)] > upper  # noqa: E731
    subjects = np.array([len(t[0]) for t in trials], float)
    return {"scenario": scenario, "design": design, "trials": len(trials), "contour": len(contour),
            "select_contour": round(float(np.mean([s is not None and tuple(s) in contour for s in sel])), 3),
            "select_above": round(float(np.mean([s is not None and above(s) for s in sel])), 3),
            "select_below": round(float(np.mean([s is not None and tuple(s) not in contour and not above(s)
                                                 for s in sel])), 3),
            "select_none": round(float(np.mean([s is None for s in sel])), 3),
            "treated_above": round(float(sum(sum(above(g) for g in t[0]) for t in trials) / subjects.sum()), 3),
            "events_per_trial": round(float(np.mean([np.sum(t[1]) for t in trials])), 2),
            "subjects_per_trial": round(float(subjects.mean()), 1)}


def two_agents(args) -> list[dict]:
    """The dose example under its scenarios: Guardband's campaigns against 3+3 along PATH."""
    protocol, found = dose_example()
    G = admissible(protocol)
    upper = protocol.limits[0].upper
    n = args.guardband_trials
    jobs = [(k, args.seed * 100_000 + 1000 * k + i, args.start, budget, args.pool)
            for budget in args.budget for k in range(len(found.scenarios)) for i in range(n)]
    results = run_in_workers(two_agent_trial, jobs, workers=args.workers)
    per_budget = len(found.scenarios) * n
    rows = []
    for k, sc in enumerate(found.scenarios):
        rate = sc.problem.evaluate(G)["dlt_rate"]
        at = {tuple(g): r for g, r in zip(G.tolist(), rate)}
        contour = mtd_contour(protocol, G, rate)
        path_rates = [at[(float(a), float(b))] for a, b in PATH]
        rng = np.random.default_rng([args.seed, 7, k])
        rows.append(summarise_two("3+3 along a fixed path", sc.name, at, contour, upper,
                                  [path_trial(path_rates, rng) for _ in range(args.trials)]))
        for b, budget in enumerate(args.budget):
            mine = results[b * per_budget + k * n:b * per_budget + (k + 1) * n]
            rows.append(summarise_two(f"Guardband ({args.start} + {budget} cohorts of "
                                      f"{sc.problem.cohort['dlt_rate']})", sc.name, at, contour, upper, mine))
        print(f"{sc.name}: MTD contour {sorted(contour)}; the path's true rates "
              + ", ".join(f"{r:.2f}" for r in path_rates))
    return rows


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
    ap.add_argument("--out", default=None, help="CSV of the table (default benchmarks/results/dose_finding.csv, "
                    "or dose_finding_two_agents.csv with --two-agents)")
    ap.add_argument("--two-agents", action="store_true",
                    help="the two-agent dose example under its scenarios instead of the single-agent trials")
    ap.add_argument("--start", type=int, default=4, help="--two-agents: starting cohorts per campaign")
    ap.add_argument("--budget", type=int, nargs="+", default=[9, 15],
                    help="--two-agents: planned cohorts per campaign (one row per value)")
    ap.add_argument("--pool", type=int, default=1000, help="--two-agents: candidate pool of every step")
    args = ap.parse_args(argv)
    start = time.time()
    if args.two_agents:
        rows = two_agents(args)
        _write(rows, Path(args.out or "benchmarks/results/dose_finding_two_agents.csv"))
        print(f"{time.time() - start:.0f} s")
        return
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
    _write(rows, Path(args.out or "benchmarks/results/dose_finding.csv"))
    print(f"{time.time() - start:.0f} s")


def _write(rows: list[dict], out: Path) -> None:
    """The rows as a CSV file and as a Markdown table on stdout."""
    out.parent.mkdir(parents=True, exist_ok=True)
    with out.open("w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    print("| " + " | ".join(rows[0]) + " |")
    print("|---|---|" + "---:|" * (len(rows[0]) - 2))
    for r in rows:
        print("| " + " | ".join(str(v) for v in r.values()) + " |")
    print(f"\nwrote {out}")
    from guardband.safety.cautions import as_text

    print("Simulated trials on invented truths: they show how the designs behave, not a dose for anyone.\n"
          "CAUTIONS:\n" + as_text("dose", prefix="  - "))


if __name__ == "__main__":
    main()
