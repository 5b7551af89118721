"""A sweep: simulated campaigns over settings x scenarios x seeds, locally or on a Dask cluster.

Settings are given as lists (:data:`SWEEP_KEYS`: the joint threshold, the
ranking rule, the batch size, the starting runs, the planned-run budget and
``max_step``); every combination runs on every scenario (a scenario of the
author's protocol, :mod:`planner.simulation.scenarios`, or a built-in
problem) for every seed. The key ``step`` chooses how much search each
planning step makes: ``full`` (the protocol's pool, refinements and model
restarts) or ``light`` (:data:`LIGHT_STEP`: a smaller pool, one refinement,
one model restart beside the warm start), a cheaper step for large sweeps
whose cost in planning quality is measured in the README; the screen is the
same in both. The planner's peers (random runs, the classical
route; :mod:`planner.simulation.peers`) can run beside it: they do not
read the planner's settings, so each runs once per scenario and per
starting-run and budget pair of the grid. One campaign is one task; the
tasks are independent and their results do not depend on where they run:

- ``workers=1``: in this process;
- ``workers>1``: a local process pool (joblib);
- ``scheduler="tcp://host:8786"``: an existing Dask distributed cluster
  (``dask.distributed.Client``); its workers need Guardband installed.
  Workers should be processes with one thread each (``dask worker
  --nthreads 1``): run in threads of one process, the same runs were
  proposed but the joint figures differed in their last bits (seen with a
  ``LocalCluster(processes=False)``; not explained yet).

Seed i of a sweep uses the same starting design and campaign seed as seed i
of :func:`~planner.simulation.runner.simulate` (its ``protocol`` strategy),
so a sweep of one setting on a built-in problem gives the same campaigns (a
peer's seed i those of its strategy in :func:`simulate`).
The figures of each (setting, scenario) cell are those of a
:class:`~planner.simulation.results.SimulationResult`, plus the runs
until the chosen run is within a stated distance of the optimum, and the
promised joint figures binned against the share that met every limit
(:func:`guardband.safety.calibration.binned_calibration`).
"""

from __future__ import annotations

import contextlib
import functools
import itertools
import math
from dataclasses import dataclass, field

import numpy as np

from guardband.planner.app.fileio import write_csv_text
from guardband.planner.app.textable import render_table
from guardband.planner.errors import ProtocolError
from guardband.planner.inputs.protocol import Protocol, parse_protocol
from guardband.planner.models import blas_limit
from guardband.planner.simulation.loop import CampaignHistory, run_campaign, start_runs
from guardband.planner.simulation.problems import objective_range
from guardband.planner.simulation.results import (SimulationResult, _finite, _fmt, _pct, _quantiles, gap_legend,
                                                  true_gap_band)
from guardband.planner.simulation.runner import _seeds, run_peer
from guardband.planner.simulation.strategies import PEERS
from guardband.planner.step.attitudes import threshold_binding

__all__ = ["SWEEP_KEYS", "LIGHT_STEP", "STEPS", "Setting", "settings_grid", "SweepCell", "SweepResult", "run_sweep",
           "WITHIN_SHARE"]

#: What a sweep can vary, in the order of a setting's label.
SWEEP_KEYS = ("threshold", "rule", "batch", "start", "budget", "max_step", "step")
#: The ``light`` step: at most these candidates (``batch.pool``), local refinements
#: (``batch.refine``) and hyperparameter restarts beside the warm start (``model.restarts``).
#: The screen, its threshold and every limit are untouched. ``full`` keeps the protocol's.
LIGHT_STEP = {"pool": 1000, "refine": 1, "restarts": 1, "search_per_run": False}
#: The values of the ``step`` key.
STEPS = ("full", "light")
#: What the light step is, in one line (the sweep's description).
LIGHT_NOTE = (f"step=light: each planning step searches less (a pool of at most {LIGHT_STEP['pool']:,} candidates, "
              f"{LIGHT_STEP['refine']} local refinement, {LIGHT_STEP['restarts']} model restart beside the warm "
              "start); the screen is the full step's; planning quality is lower (see the README)")
#: What each peer does, in one phrase (the sweep's description).
PEER_NOTES = {"random": "random: the starting runs, then the budget drawn uniformly from the design space",
              "classical": "classical: a space-filling design of start + budget - 1 runs, quadratic fits, "
                           "one confirmation run at the fitted best point"}
#: Default distance for "runs until within": this share of the objective's range over the design space.
WITHIN_SHARE = 0.01


@dataclass(frozen=True)
class Setting:
    """One combination of varied settings; None keeps the protocol's (or the scenario's) value."""

    threshold: float | None = None
    rule: str | None = None
    batch: int | None = None
    start: int | None = None
    budget: int | None = None
    max_step: float | None = None
    step: str | None = None

    @property
    def label(self) -> str:
        parts = [f"{k}={getattr(self, k):g}" if isinstance(getattr(self, k), float) else f"{k}={getattr(self, k)}"
                 for k in SWEEP_KEYS if getattr(self, k) is not None]
        return ",".join(parts) or "as-written"

    def protocol_data(self, protocol: Protocol) -> dict:
        """The protocol (as a dict) with this setting's threshold, rule, batch, max_step and step."""
        data = protocol.model_dump(mode="python")
        if self.threshold is not None:
            data["screen"]["threshold"] = float(self.threshold)
        if self.rule is not None:
            data["ranking"]["rule"] = self.rule
        if self.batch is not None:
            data["batch"]["size"] = int(self.batch)
        if self.max_step is not None:
            data["screen"]["max_step"] = float(self.max_step)
        if self.step is not None and self.step not in STEPS:
            raise ValueError(f"step {self.step!r} is not known; a step is one of {', '.join(STEPS)}")
        if self.step == "light":
            batch, model = data["batch"], data["model"]
            batch["pool"] = min(int(batch["pool"]), LIGHT_STEP["pool"])
            batch["refine"] = min(int(batch["refine"]), LIGHT_STEP["refine"])
            batch["search_per_run"] = LIGHT_STEP["search_per_run"]  # one search per step, whatever the batch
            model["restarts"] = min(int(model["restarts"]), LIGHT_STEP["restarts"])
        return data


def settings_grid(vary: dict | None) -> list[Setting]:
    """Every combination of the varied values (keys from :data:`SWEEP_KEYS`), in the order given."""
    vary = dict(vary or {})
    for key in vary:
        if key not in SWEEP_KEYS:
            raise ValueError(f"cannot vary {key!r}; a sweep varies {', '.join(SWEEP_KEYS)}")
    keys = [k for k in SWEEP_KEYS if k in vary]
    return [Setting(**dict(zip(keys, combo))) for combo in itertools.product(*(vary[k] for k in keys))]


# ------------------------------------------------------------------ tasks
@dataclass(frozen=True)
class _Task:
    cell: int
    seed_index: int
    scenario: object  # a Scenario (or a built-in problem wrapped as one)
    protocol_data: dict
    n_start: int
    budget: int
    base_seed: int
    noise_scale: float
    pool_size: int | None
    strategy: str = "protocol"  # or a peer (random, classical)


@contextlib.contextmanager
def _one_thread_each():
    """BLAS on one thread and no nested worker pools, as in :func:`runner.run_in_workers`."""
    from guardband.planner.models import gp
    from guardband.planner.step import fitting

    saved = fitting.FIT_WORKERS, gp.PREDICT_WORKERS
    fitting.FIT_WORKERS, gp.PREDICT_WORKERS = 1, 1
    try:
        with blas_limit():
            yield
    finally:
        fitting.FIT_WORKERS, gp.PREDICT_WORKERS = saved


def _run_task(task: _Task) -> tuple[CampaignHistory, float, float]:
    """One campaign: (its history, the known optimum of its truth, the objective range of a drawn
    truth; NaN for a scenario's one truth, whose range the sweep takes once)."""
    with _one_thread_each():
        problem = task.scenario.problem_for(task.base_seed, task.seed_index)
        protocol = parse_protocol(task.protocol_data, source=f"sweep cell {task.cell}")
        start_rng, seed = _seeds(task.base_seed, task.seed_index)
        # the classical route makes its own design
        X_start = None if task.strategy == "classical" else start_runs(protocol, task.n_start, rng=start_rng)
        measure = functools.partial(problem.measure, scale=task.noise_scale, noise={})
        if task.strategy in PEERS:
            history = run_peer(task.strategy, problem, protocol, X_start=X_start, n_start=task.n_start,
                               budget=task.budget, seed=seed, measure=measure, pool_size=task.pool_size)
            return history, float(problem.optimum), _drawn_range(task.scenario, problem)
        history = run_campaign(protocol, problem.evaluate, n_start=task.n_start, budget=task.budget, seed=seed,
                               X_start=X_start, measure=measure, pool_size=task.pool_size, cohort=problem.cohort)
    return history, float(problem.optimum), _drawn_range(task.scenario, problem)


def _drawn_range(scenario, problem) -> float:
    return objective_range(problem) if scenario.drawn else float("nan")


def _run_local(tasks, workers: int, progress) -> list:
    if workers == 1:
        out = []
        for i, task in enumerate(tasks):
            out.append(_run_task(task))
            if progress is not None:
                progress(i + 1, len(tasks))
        return out
    from joblib import Parallel, delayed

    out = []
    results = Parallel(n_jobs=workers, backend="loky", return_as="generator")(delayed(_run_task)(t) for t in tasks)
    for i, result in enumerate(results):
        out.append(result)
        if progress is not None:
            progress(i + 1, len(tasks))
    return out


def _run_dask(tasks, scheduler, progress) -> list:
    """The tasks on a Dask distributed cluster: ``scheduler`` is an address or a ``Client``."""
    try:
        from dask.distributed import Client, as_completed
    except ImportError:
        raise ValueError("running on a Dask cluster needs the 'distributed' package: "
                         "pip install 'guardband[cluster]'") from None

    own = not isinstance(scheduler, Client)
    client = Client(scheduler) if own else scheduler
    try:
        futures = client.map(_run_task, tasks, pure=False)
        index = {f.key: i for i, f in enumerate(futures)}
        out: list = [None] * len(tasks)
        for done, fut in enumerate(as_completed(futures), start=1):
            out[index[fut.key]] = fut.result()
            if progress is not None:
                progress(done, len(tasks))
        return out
    finally:
        if own:
            client.close()


# ----------------------------------------------------------------- results
@dataclass(frozen=True)
class SweepCell:
    """The campaigns of one setting (or one peer) on one scenario, summarised as a :class:`SimulationResult`.

    A peer's setting holds only the starting runs and budget it ran with.
    """

    setting: Setting
    scenario: str
    result: SimulationResult
    within: float
    strategy: str = "protocol"

    @property
    def label(self) -> str:
        """The setting's label; a peer's name, with its starting runs and budget when these are varied."""
        if self.strategy == "protocol":
            return self.setting.label
        return self.strategy + ("" if self.setting.label == "as-written" else f",{self.setting.label}")

    def runs_until_within(self) -> np.ndarray:
        """Per seed, the planned runs until the chosen run's true gap was at most ``within`` and its true
        values met every limit (NaN: never)."""
        tr = self.result.trajectories(self.strategy)
        hit = (tr["gap_true"] <= self.within) & tr["chosen_met"]
        return np.where(hit.any(axis=1), hit.argmax(axis=1), np.nan).astype(float)

    def row(self) -> dict:
        """The cell's figures at the end of the budget."""
        final = self.result.final_rows()[0]
        runs = self.runs_until_within()
        q = _quantiles(runs[np.isfinite(runs)]) if np.any(np.isfinite(runs)) else [math.nan] * 3
        out = {"setting": self.label, "strategy": self.strategy, "scenario": self.scenario}
        out.update({k: getattr(self.setting, k) for k in SWEEP_KEYS})
        out.update(start_runs=self.result.n_start, planned_runs=self.result.budget, seeds=self.result.seeds)
        for key in ("gap_q25", "gap_median", "gap_q75", "gap_true_q25", "gap_true_median", "gap_true_q75",
                    "broken_pooled", "runs_made", "no_safe_run", "stalled", "promised_joint_mean",
                    "observed_met_share", "n_promised", "chosen_broke"):
            out[key] = final[key]
        half = self.result.summary_rows([self.result.budget // 2])[0]
        out["gap_median_halfway"] = half["gap_median"]
        out["gap_true_median_halfway"] = half["gap_true_median"]
        out["within"] = self.within
        out.update(reached=int(np.isfinite(runs).sum()), runs_until_within_q25=q[0],
                   runs_until_within_median=q[1], runs_until_within_q75=q[2])
        return out

    def calibration_rows(self) -> list[dict]:
        """The planned runs' promised joint figures, binned, against the share that met every limit
        (none for a peer: it promises nothing)."""
        if self.strategy != "protocol":
            return []
        head = {"setting": self.label, "strategy": self.strategy, "scenario": self.scenario,
                "threshold": self.result.protocol.screen.threshold}
        return [{**head, **b} for b in self.result.calibration_bins(self.strategy)]


@dataclass(frozen=True)
class SweepResult:
    """Every cell of a sweep, in the order settings x scenarios."""

    cells: tuple[SweepCell, ...]
    seeds: int
    base_seed: int
    noise_scale: float
    runner: str
    notes: tuple[str, ...] = field(default_factory=tuple)

    def rows(self) -> list[dict]:
        return [c.row() for c in self.cells]

    CSV_COLUMNS = ("setting", "strategy", "scenario") + SWEEP_KEYS + (
        "start_runs", "planned_runs", "seeds", "gap_q25", "gap_median", "gap_q75", "gap_true_q25",
        "gap_true_median", "gap_true_q75", "gap_median_halfway", "gap_true_median_halfway", "broken_pooled",
        "runs_made", "no_safe_run",
        "stalled", "within", "reached", "runs_until_within_q25", "runs_until_within_median",
        "runs_until_within_q75", "promised_joint_mean", "observed_met_share", "n_promised", "chosen_broke")

    CALIBRATION_COLUMNS = ("setting", "strategy", "scenario", "threshold", "low", "high", "runs", "met",
                           "met_share", "mean_promised", "ci_low", "ci_high")

    def calibration_rows(self) -> list[dict]:
        return [b for c in self.cells for b in c.calibration_rows()]

    def calibration_csv_text(self) -> str:
        """One row per (setting, scenario, bin of the promised joint figure), with comment lines."""
        lines = ["the joint figure each planned run was proposed with, binned [low, high) (the last bin "
                 "includes 1), against the share of those runs whose true values met every limit; "
                 "ci_low, ci_high: exact 95% interval of that share (Clopper-Pearson)"]
        return write_csv_text([[r[c] for c in self.CALIBRATION_COLUMNS] for r in self.calibration_rows()],
                              list(self.CALIBRATION_COLUMNS),
                              comment_lines=self.description() + lines + [f"CAUTION: {c}" for c in self.cautions()],
                              float_format=".6g")

    def description(self) -> list[str]:
        """Lines saying what was swept (for comments, the terminal and the page)."""
        first = self.cells[0].result
        noise = "off" if self.noise_scale == 0 else (
            "as each scenario states" if self.noise_scale == 1 else f"{self.noise_scale:g} times each scenario's")
        planner = [c for c in self.cells if c.strategy == "protocol"]
        peers = list(dict.fromkeys(c.strategy for c in self.cells if c.strategy != "protocol"))
        lines = [f"{len({c.setting for c in planner})} setting(s) x {len({c.scenario for c in self.cells})} "
                 f"scenario(s) x {self.seeds} seeds (base seed {self.base_seed}); measurement noise {noise}; "
                 f"run on {self.runner}",
                 "limits: " + "; ".join(f"{lim.describe()} with probability >= {lim.probability:g}"
                                        for lim in first.protocol.limits)]
        if peers:
            lines.append("peers, on the same starting runs, seeds and truths: " + "; ".join(
                PEER_NOTES[p] for p in peers))
        if any(c.setting.step == "light" for c in planner):
            lines.append(LIGHT_NOTE)
        for label, protocol in {c.setting.label: c.result.protocol for c in planner}.items():
            lines += [f"setting {label}: {w}" for w in threshold_binding(protocol)]
        for c in self.cells:
            if c.setting == self.cells[0].setting and c.strategy == self.cells[0].strategy:
                lines.append(f"scenario {c.scenario}: " + c.result.description()[1])
        return lines + list(self.notes)

    def cautions(self) -> tuple[str, ...]:
        return self.cells[0].result.cautions()

    def csv_text(self) -> str:
        """One row per (setting, scenario), with comment lines and cautions."""
        return write_csv_text([[r[c] for c in self.CSV_COLUMNS] for r in self.rows()], list(self.CSV_COLUMNS),
                              comment_lines=self.description() + [f"CAUTION: {c}" for c in self.cautions()],
                              float_format=".6g")

    def table_text(self) -> str:
        """The readable table: one row per (setting, scenario)."""
        noisy = self.noise_scale > 0
        head = ["setting", "scenario", ("true gap at the chosen run" if noisy else "gap") + " (median [IQR])",
                ("true gap" if noisy else "gap") + " halfway", "broke a limit", "runs until within (median [IQR], reached)", "stalled",
                "promised / met"]
        rows = []
        for r in self.rows():
            g = ("gap_true_" if noisy else "gap_")
            rows.append([r["setting"], r["scenario"],
                         true_gap_band(r, r["seeds"]) if noisy else
                         f"{_fmt(r[g + 'median'])} [{_fmt(r[g + 'q25'])}, {_fmt(r[g + 'q75'])}]",
                         _fmt(r[g + "median_halfway"]), _pct(r["broken_pooled"]),
                         f"{_fmt(r['runs_until_within_median'])} [{_fmt(r['runs_until_within_q25'])}, "
                         f"{_fmt(r['runs_until_within_q75'])}], {r['reached']}/{r['seeds']} (within "
                         f"{_fmt(r['within'])})",
                         f"{r['stalled']}/{r['seeds']}",
                         f"{_fmt(r['promised_joint_mean'])} / {_fmt(r['observed_met_share'])}"])
        cal = [[r["setting"], r["scenario"], _bin_label(r), r["runs"], _fmt(r["mean_promised"]),
                f"{_fmt(r['met_share'])} [{_fmt(r['ci_low'])}, {_fmt(r['ci_high'])}]"]
               for r in self.calibration_rows() if r["runs"]]
        parts = self.description() + ["", render_table(head, rows, max_width=40), gap_legend(noisy)]
        if cal:
            parts += ["", "the promise in bins (planned runs, all seeds; met: by the true values, exact 95% "
                          "interval):",
                      render_table(["setting", "scenario", "promised joint", "runs", "mean promised",
                                    "met every limit"], cal, max_width=40)]
        return "\n".join(parts)

    def to_dict(self) -> dict:
        return {"description": self.description(), "seeds": self.seeds, "base_seed": self.base_seed,
                "noise_scale": self.noise_scale, "runner": self.runner,
                "rows": [_finite(r) for r in self.rows()],
                "calibration": [_finite(r) for r in self.calibration_rows()], "cautions": list(self.cautions())}

    def files(self) -> dict[str, str]:
        """File name -> text: the summary CSV and one CSV per (setting, scenario) at every planned-run count."""
        out = {"sweep.csv": self.csv_text(), "sweep-calibration.csv": self.calibration_csv_text()}
        for i, c in enumerate(self.cells, start=1):
            out[f"cell-{i:03d}-{_safe(c.label)}-{_safe(c.scenario)}.csv"] = c.result.csv_text()
        return out


def _bin_label(row: dict) -> str:
    """A bin of promised figures as an interval, e.g. "[0.9, 0.95)" (the last bin is closed)."""
    return f"[{row['low']:g}, {row['high']:g}" + ("]" if row["high"] >= 1.0 else ")")


def _safe(text: str) -> str:
    """A file-name-safe form of a label."""
    return "".join(ch if ch.isalnum() or ch in "._-" else "_" for ch in text)[:60]


def _default_within(ranges) -> float:
    """:data:`WITHIN_SHARE` of the median objective range of a cell's truths."""
    return WITHIN_SHARE * float(np.median(np.asarray(ranges, dtype=float)))


def run_sweep(scenarios, protocol_for, *, vary: dict | None = None, seeds: int = 5, base_seed: int = 0,
              n_start: int = 10, budget: int = 30, noise_scale: float = 1.0, within: float | None = None,
              workers: int = 1, scheduler=None, pool_size: int | None = None, peers=(),
              progress=None) -> SweepResult:
    """Run every setting x scenario x seed campaign and summarise each (setting, scenario) cell.

    Parameters
    ----------
    scenarios : sequence of Scenario
        Each with ``name``, ``problem`` and ``problem_for(base_seed, seed_index)``.
    protocol_for : callable
        ``protocol_for(scenario) -> Protocol``: the protocol its campaigns
        start from (before the setting's changes).
    vary : dict of str to list, optional
        Values per key of :data:`SWEEP_KEYS`; none: one setting, as written.
    seeds : int
    base_seed : int
    n_start, budget : int
        Starting and planned runs when the setting does not vary them.
    noise_scale : float
        Multiplies every measurement sd of the truth (1: as stated, 0: none).
    within : float, optional
        Distance to the optimum for "runs until within" (objective units);
        default :data:`WITHIN_SHARE` of the objective's range over the design
        space under the truth (the median over a cell's drawn truths).
    workers : int
        1: in this process; more: a joblib process pool.
    scheduler : str or dask.distributed.Client, optional
        Run on this Dask cluster instead.
    pool_size : int, optional
        Candidate pool of every planning step (default the protocol's) and
        of the classical route (default
        :data:`~guardband.planner.simulation.peers.CLASSICAL_POOL`).
    peers : sequence of str
        Peers (:data:`~guardband.planner.simulation.strategies.PEERS`) run
        beside the planner on every scenario, once per distinct (starting
        runs, budget) pair of the grid, on the protocol as written; their
        cells follow the planner's.
    progress : callable, optional
        ``progress(done, total)`` after each campaign.

    Returns
    -------
    SweepResult
    """
    grid = settings_grid(vary)
    scenarios = list(scenarios)
    peers = tuple(dict.fromkeys(peers))
    if seeds < 1 or workers < 1 or not scenarios:
        raise ValueError("a sweep needs at least one scenario, one seed and one worker")
    for peer in peers:
        if peer not in PEERS:
            raise ValueError(f"{peer!r} is not a peer; peers: {', '.join(PEERS)}")
    cells, tasks = [], []

    def add(setting, sc, data, strategy):
        start = n_start if setting.start is None else int(setting.start)
        planned = budget if setting.budget is None else int(setting.budget)
        cells.append((setting, sc, data, start, planned, strategy))
        tasks.extend(_Task(len(cells) - 1, s, sc, data, start, planned, int(base_seed), float(noise_scale),
                           pool_size, strategy) for s in range(seeds))

    for setting in grid:
        for sc in scenarios:
            data = setting.protocol_data(protocol_for(sc))
            if pool_size is not None:  # the campaigns' pool, as the cell's settings line shows it
                data = {**data, "batch": {**data["batch"], "pool": int(pool_size)}}
            try:  # a bad value fails here, not in a worker
                parse_protocol(data, source=f"setting {setting.label}")
            except ProtocolError as exc:
                raise ValueError(str(exc)) from None
            add(setting, sc, data, "protocol")
    sizes = list(dict.fromkeys(Setting(start=g.start, budget=g.budget) for g in grid)) if peers else []
    for size in sizes:
        for sc in scenarios:
            for peer in peers:
                add(size, sc, protocol_for(sc).model_dump(mode="python"), peer)
    if scheduler is not None:
        results, runner = _run_dask(tasks, scheduler, progress), f"dask ({scheduler})"
    else:
        results, runner = _run_local(tasks, workers, progress), (
            "this process" if workers == 1 else f"joblib, {workers} processes")
    out = []
    for c, (setting, sc, data, start, planned, strategy) in enumerate(cells):
        mine = [r for t, r in zip(tasks, results) if t.cell == c]
        protocol = parse_protocol(data, source=f"setting {setting.label}")
        optima = tuple(o for _, o, _ in mine)
        result = SimulationResult(
            problem=sc.problem, protocol=protocol, strategies=(strategy,), same_as={},
            histories={strategy: [h for h, _, _ in mine]}, n_start=start, budget=planned, seeds=seeds,
            base_seed=int(base_seed), noise_scale=float(noise_scale), noise={},
            workers=workers, optima=optima if sc.drawn else (),
        )
        ranges = [r for _, _, r in mine] if sc.drawn else [objective_range(sc.problem)]
        out.append(SweepCell(setting, sc.name, result, _default_within(ranges) if within is None else float(within),
                             strategy))
    return SweepResult(tuple(out), seeds, int(base_seed), float(noise_scale), runner)
