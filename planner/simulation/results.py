"""The summaries of a simulation: trajectories over planned runs, quantiles over seeds, tables.

What is reported
----------------
For every strategy and every planned-run count k = 0..budget (runs after
the first ``n_start``, the same for every strategy), over seeds: the best
measured objective among runs whose measured responses met every limit
(the lab's view), the gap to the known optimum (positive is worse; no safe
run counts as an infinite gap) and the share of planned runs that broke a
limit by the true responses; medians and quartiles. The true gap at the
run the lab would pick is taken over the campaigns whose chosen run truly
met every limit; those whose chosen run truly broke one are counted apart. For the planner
strategies, the mean joint figure promised by the screen against the
observed share of planned runs that met every limit (calibration).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from guardband.planner.app.fileio import write_csv_text
from guardband.planner.app.textable import render_table
from guardband.planner.inputs.protocol import Protocol
from guardband.planner.simulation.loop import best_safe_runs
from guardband.planner.simulation.problems import Problem

__all__ = ["SimulationResult", "QUARTILES", "SIMULATION_CAUTION"]

#: Quantiles reported over seeds.
QUARTILES = (0.25, 0.5, 0.75)
SIMULATION_CAUTION = (
    "Simulated against a test problem with known answers: a real study's responses, noise "
    "and model fit differ, so these figures show tendencies, not guarantees."
)


def _quantiles(values, qs=QUARTILES) -> list[float]:
    """Linear-interpolation quantiles that treat +inf as larger than everything; NaN dropped."""
    v = np.sort(np.asarray(values, dtype=float)[~np.isnan(np.asarray(values, dtype=float))])
    if v.size == 0:
        return [float("nan")] * len(qs)
    out = []
    for q in qs:
        h = (v.size - 1) * q
        lo, hi = int(math.floor(h)), int(math.ceil(h))
        if lo == hi or v[lo] == v[hi]:
            out.append(float(v[lo]))
        elif math.isinf(v[hi]):
            out.append(float("inf"))
        else:
            out.append(float(v[lo] + (h - lo) * (v[hi] - v[lo])))
    return out


@dataclass(frozen=True)
class SimulationResult:
    """Every simulated campaign of one call to :func:`simulate`, and their summaries.

    Attributes
    ----------
    problem : Problem
    protocol : Protocol
        The combined protocol (problem's world, settings' planner).
    strategies : tuple of str
    same_as : dict of str to str
        Strategy -> the strategy whose campaigns it shares (equal protocols).
    histories : dict of str to list of CampaignHistory
        One per seed, for every strategy.
    n_start, budget, seeds, base_seed : int
    noise_scale : float
    noise : dict
    workers : int
    optima : tuple of float
        The known optimum of each seed's campaign, when the truth differs
        from seed to seed (drawn scenarios); empty: the problem's optimum.
    """

    problem: Problem
    protocol: Protocol
    strategies: tuple[str, ...]
    same_as: dict
    histories: dict
    n_start: int
    budget: int
    seeds: int
    base_seed: int
    noise_scale: float
    noise: dict
    workers: int
    optima: tuple = ()

    def optimum_of(self, seed_index: int) -> float:
        """The known optimum of one seed's campaign."""
        return float(self.optima[seed_index]) if self.optima else float(self.problem.optimum)

    # -------------------------------------------------------- trajectories
    def trajectories(self, strategy: str) -> dict[str, np.ndarray]:
        """Per seed and planned-run count k = 0..budget.

        Returns
        -------
        dict with arrays of shape (seeds, budget + 1):
            ``best`` (NaN before a safe run), ``gap`` (inf before a safe run),
            ``broken`` (share of planned runs so far that broke a limit; NaN
            at k = 0), ``made`` (planned runs actually made by k, fewer than
            k when a campaign stopped early), ``gap_true`` (the gap of the
            *true* objective at the run the lab would pick, the best measured
            among runs measured within every limit; equal to ``gap`` without
            noise; inf before a safe run), ``chosen_met`` (whether that run's
            *true* values met every limit: a run measured within the limits
            may truly have broken one, and then its gap can be negative),
            ``chosen_broke`` (there is a chosen run and its true values broke a limit).
        """
        sign = -1.0 if self.protocol.maximize else 1.0
        obj = self.protocol.objective.name
        B, S = self.budget, self.seeds
        best = np.full((S, B + 1), np.nan)
        chosen_true = np.full((S, B + 1), np.nan)
        chosen_met = np.zeros((S, B + 1), dtype=bool)
        broken = np.full((S, B + 1), np.nan)
        made = np.zeros((S, B + 1), dtype=int)
        for s, h in enumerate(self.histories[strategy]):
            n_start = int((~h.planned).sum())
            n_planned = int(h.planned.sum())
            chosen = best_safe_runs(self.protocol, h.Y) if obj in h.Y and obj in h.T else None
            for k in range(B + 1):
                m = min(k, n_planned)
                made[s, k] = m
                last = n_start + m - 1
                best[s, k] = h.best_safe[last] if last >= 0 else np.nan
                if chosen is not None and last >= 0 and chosen[last] >= 0:
                    chosen_true[s, k] = h.T[obj][chosen[last]]
                    chosen_met[s, k] = not h.broke_limit[chosen[last]]
                if m:
                    broken[s, k] = float(np.mean(h.broke_limit[n_start:n_start + m]))
        optimum = np.array([[self.optimum_of(s)] for s in range(S)]).reshape(S, 1)
        gap = np.where(np.isnan(best), np.inf, sign * (best - optimum) + 0.0)  # no -0
        gap_true = np.where(np.isnan(chosen_true), np.inf, sign * (chosen_true - optimum) + 0.0)
        return {"best": best, "gap": gap, "broken": broken, "made": made, "gap_true": gap_true,
                "chosen_met": chosen_met, "chosen_broke": np.isfinite(chosen_true) & ~chosen_met}

    def checkpoints(self) -> list[int]:
        """Planned-run counts shown in the table: 0, about a quarter, half, three quarters, all."""
        B = self.budget
        return sorted({0, *(int(round(B * f)) for f in (0.25, 0.5, 0.75)), B})

    # ------------------------------------------------------------ summaries
    def summary_rows(self, counts=None) -> list[dict]:
        """One row per strategy and planned-run count (every count by default)."""
        counts = range(self.budget + 1) if counts is None else counts
        rows = []
        for st in self.strategies:
            tr = self.trajectories(st)
            for k in counts:
                b, g, r = _quantiles(tr["best"][:, k]), _quantiles(tr["gap"][:, k]), _quantiles(tr["broken"][:, k])
                # a chosen run that truly broke a limit has no gap (it may lie below the optimum)
                gt = _quantiles(np.where(tr["chosen_broke"][:, k], np.nan, tr["gap_true"][:, k]))
                made = int(tr["made"][:, k].sum())
                pooled = (float(np.nansum(tr["broken"][:, k] * tr["made"][:, k]) / made)
                          if made else float("nan"))
                rows.append({
                    "strategy": st,
                    "planned_runs": int(k),
                    "seeds": self.seeds,
                    "best_q25": b[0], "best_median": b[1], "best_q75": b[2],
                    "gap_q25": g[0], "gap_median": g[1], "gap_q75": g[2],
                    "broken_q25": r[0], "broken_median": r[1], "broken_q75": r[2],
                    "gap_true_q25": gt[0], "gap_true_median": gt[1], "gap_true_q75": gt[2],
                    "broken_pooled": pooled,
                    "runs_made": made,
                    "no_safe_run": int(np.sum(np.isnan(tr["best"][:, k]))),
                    "chosen_broke": int(np.sum(tr["chosen_broke"][:, k])),
                })
        return rows

    def final_rows(self) -> list[dict]:
        """One row per strategy at the full budget, with stalls and calibration."""
        rows = []
        for row, st in zip(self.summary_rows([self.budget]), self.strategies):
            cal = self.calibration(st)
            cal.update(self.downside(st))
            row = dict(row)
            row["same_as"] = self.same_as.get(st, "")
            row["stalled"] = int(sum(h.stalled for h in self.histories[st]))
            row.update(cal)
            rows.append(row)
        return rows

    def promised_and_met(self, strategy: str) -> tuple[np.ndarray, np.ndarray]:
        """Every planned run's promised joint figure (NaN: none) and whether it met every limit (all seeds)."""
        promised = [h.promised[h.planned] for h in self.histories[strategy]]
        met = [~h.broke_limit[h.planned] for h in self.histories[strategy]]
        return (np.concatenate(promised) if promised else np.zeros(0),
                np.concatenate(met) if met else np.zeros(0, bool))

    def calibration_bins(self, strategy: str) -> list[dict]:
        """The promised joint figures of the planned runs binned against the share that met every
        limit, with exact intervals (:func:`guardband.safety.calibration.binned_calibration`)."""
        from guardband.safety.calibration import binned_calibration

        p, m = self.promised_and_met(strategy)
        return binned_calibration(p, m, self.protocol.screen.threshold)

    def calibration(self, strategy: str) -> dict:
        """Mean promised joint figure vs observed share meeting every limit (planned runs, all seeds)."""
        p, m = self.promised_and_met(strategy)
        has = np.isfinite(p)
        return {
            "promised_joint_mean": float(np.mean(p[has])) if np.any(has) else float("nan"),
            "observed_met_share": float(np.mean(m[has])) if np.any(has) else float("nan"),
            "n_promised": int(np.sum(has)),
        }

    def downside(self, strategy: str) -> dict:
        """How the rule's attitude shows in outcomes: over planned runs made while there was an
        incumbent (all seeds), the share whose measured objective came out worse than the
        incumbent of their step, and the mean shortfall below it (0 for a run that was not worse)."""
        sign = 1.0 if self.protocol.maximize else -1.0
        obj = self.protocol.objective.name
        short = []
        for h in self.histories[strategy]:
            if obj not in h.Y:
                continue
            inc = h.incumbent if h.incumbent is not None else np.full(h.planned.shape, np.nan)
            has = h.planned & np.isfinite(inc) & np.isfinite(h.Y[obj])
            short.append(np.maximum(sign * (inc[has] - h.Y[obj][has]), 0.0))
        s = np.concatenate(short) if short else np.zeros(0)
        return {"worse_share": float(np.mean(s > 0)) if s.size else float("nan"),
                "mean_shortfall": float(np.mean(s)) if s.size else float("nan"),
                "n_with_incumbent": int(s.size)}

    # -------------------------------------------------------------- output
    CSV_COLUMNS = ("strategy", "planned_runs", "seeds", "best_q25", "best_median", "best_q75",
                   "gap_q25", "gap_median", "gap_q75", "gap_true_q25", "gap_true_median", "gap_true_q75",
                   "broken_q25", "broken_median", "broken_q75", "broken_pooled", "runs_made", "no_safe_run",
                   "chosen_broke")

    def description(self) -> list[str]:
        """Lines saying what was simulated (for comments and the terminal)."""
        p = self.protocol
        noise = "off" if self.noise_scale == 0 else (
            f"scale {self.noise_scale:g} of the problem's noise"
            + (f", sd {self.noise}" if self.noise else "")
            + (f"; {', '.join(self.problem.cohort)} measured out of a cohort of "
               f"{', '.join(str(v) for v in self.problem.cohort.values())}" if self.problem.cohort else ""))
        return [
            f"problem {self.problem.name}: {self.problem.source}",
            (f"known optimum of each seed's drawn truth ({p.objective.direction}): from "
             f"{min(self.optima):.6g} to {max(self.optima):.6g}" if self.optima else
             f"known optimum {self.problem.optimum:.10g} ({p.objective.direction}) "
             "at (" + ", ".join(f"{n}={float(v):.6g}" for n, v in zip(p.factor_names, self.problem.optimum_x))
             + ")"),
            f"{self.seeds} seeds (base seed {self.base_seed}); {self.n_start} starting runs + "
            f"{self.budget} planned runs; measurement noise {noise}",
            f"settings: threshold {p.screen.threshold:g} ({p.screen.joint}), rule {p.ranking.rule} "
            f"(kappa {p.ranking.kappa:g}, xi {p.ranking.xi:g}), batch {p.batch.size}, "
            f"pool {p.batch.pool}, refine {p.batch.refine}, restarts {p.model.restarts}; "
            "limits: " + "; ".join(f"{lim.describe()} with probability >= {lim.probability:g}"
                                   for lim in p.limits),
        ]

    def cautions(self) -> tuple[str, ...]:
        from guardband.safety.cautions import cautions_for

        return (SIMULATION_CAUTION,) + cautions_for(self.protocol.study.kind)

    def csv_text(self) -> str:
        """Every strategy at every planned-run count, as CSV with comment lines."""
        rows = self.summary_rows()
        return write_csv_text([[r[c] for c in self.CSV_COLUMNS] for r in rows], list(self.CSV_COLUMNS),
                              comment_lines=self.description() + [f"CAUTION: {c}" for c in self.cautions()],
                              float_format=".6g")

    def table_text(self) -> str:
        """Readable tables: the state at the full budget, the gap over run counts, calibration."""
        def band(q25, med, q75):
            return f"{_fmt(med)} [{_fmt(q25)}, {_fmt(q75)}]"

        final = self.final_rows()
        head1 = ["strategy", "best safe (median [IQR])", "gap to optimum", "broke a limit (pooled)",
                 "per seed (median [IQR])", "no safe run", "stalled"]
        rows1 = [[_label(r), band(r["best_q25"], r["best_median"], r["best_q75"]),
                  band(r["gap_q25"], r["gap_median"], r["gap_q75"]),
                  _pct(r["broken_pooled"]),
                  f"{_pct(r['broken_median'])} [{_pct(r['broken_q25'])}, {_pct(r['broken_q75'])}]",
                  r["no_safe_run"], r["stalled"]] for r in final]
        if self.noise_scale > 0:
            # with noise the best measured value is flattered by luck; the true
            # value at the run the lab would pick is the fair gap
            head1.insert(3, "true gap at the chosen run")
            for row, r in zip(rows1, final):
                row.insert(3, true_gap_band(r, r["seeds"]))
        counts = self.checkpoints()
        by = {(r["strategy"], r["planned_runs"]): r for r in self.summary_rows(counts)}
        head2 = ["median gap after k planned runs"] + [f"k={k}" for k in counts]
        rows2 = [[st] + [_fmt(by[(st, k)]["gap_median"]) for k in counts] for st in self.strategies]
        head3 = ["strategy", "mean promised joint", "observed share meeting every limit", "runs"]
        rows3 = [[_label(r), _fmt(r["promised_joint_mean"]), _fmt(r["observed_met_share"]), r["n_promised"]]
                 for r in final if r["n_promised"]]
        parts = ["\n".join(self.description()), "",
                 f"after {self.budget} planned runs:", render_table(head1, rows1, max_width=60),
                 gap_legend(self.noise_scale > 0), "", render_table(head2, rows2)]
        if rows3:
            parts += ["", "calibration of the screen (planned runs, all seeds):", render_table(head3, rows3)]
        head4 = ["strategy", "planned runs worse than the incumbent", "mean shortfall", "runs"]
        rows4 = [[_label(r), _pct(r["worse_share"]), _fmt(r["mean_shortfall"]), r["n_with_incumbent"]]
                 for r in final if r["n_with_incumbent"]]
        if rows4:
            parts += ["", "the downside of each strategy (planned runs made while there was an incumbent; "
                          "measured objective against the incumbent of their step):", render_table(head4, rows4)]
        return "\n".join(parts)

    def to_dict(self) -> dict:
        """JSON-able summary: description, final rows, every row, calibration, cautions."""
        return {
            "problem": self.problem.name,
            "source": self.problem.source,
            "optimum": self.problem.optimum,
            "optimum_x": list(self.problem.optimum_x),
            "maximize": self.protocol.maximize,
            "n_start": self.n_start,
            "budget": self.budget,
            "seeds": self.seeds,
            "base_seed": self.base_seed,
            "noise_scale": self.noise_scale,
            "noise": dict(self.noise),
            "protocol_fingerprint": self.protocol.fingerprint,
            "description": self.description(),
            "final": [_finite(r) for r in self.final_rows()],
            "rows": [_finite(r) for r in self.summary_rows()],
            "cautions": list(self.cautions()),
        }



def true_gap_band(row: dict, seeds: int, prefix: str = "gap_true_") -> str:
    """A row's true gap as "median [q25, q75]", saying how many chosen runs truly broke a limit."""
    text = f"{_fmt(row[prefix + 'median'])} [{_fmt(row[prefix + 'q25'])}, {_fmt(row[prefix + 'q75'])}]"
    return text + (f", {row['chosen_broke']}/{seeds} chosen broke a limit" if row["chosen_broke"] else "")


def gap_legend(noisy: bool) -> str:
    """What the gap figures of a table mean, and what ``inf`` means."""
    if not noisy:
        return ("gap: the best objective among runs that met every limit, from the known optimum (positive "
                "is worse); inf: no run met every limit")
    return ("true gap: the true objective at the chosen run (the best measured among runs measured within "
            "every limit) from the known optimum, positive is worse, over the campaigns whose chosen run "
            "truly met every limit; 'chosen broke a limit': campaigns whose chosen run truly broke one (no "
            "gap given); inf: no run was measured within every limit, so none to choose")


def _finite(row: dict) -> dict:
    return {k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in row.items()}


def _fmt(v) -> str:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "-"
    if isinstance(v, float) and math.isinf(v):
        return "inf" if v > 0 else "-inf"
    return f"{v:.4g}"


def _pct(v) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "-"
    return f"{100 * v:.1f}%"


def _label(row: dict) -> str:
    return row["strategy"] + (f" (= {row['same_as']})" if row.get("same_as") else "")

