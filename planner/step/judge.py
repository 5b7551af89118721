"""Judge given recipes as the plan judges its own candidates.

A recipe (a point in protocol units) gets what a proposal gets: the hard
rules and the full screen (through :class:`.context.StepContext`, which
calls :func:`guardband.safety.screen.screen_points`), the objective's
prediction with its 95% interval, every limit's probability, the joint
figure and the four rule values, all from the models of
:func:`.plan.prepare_step`. With the seed and warm start of a plan, a
proposal of that plan fed back gets the plan's own numbers.

A recipe is judged as given. When the protocol states resolutions and a
recipe's amount is not a multiple of its factor's resolution, the verdict
names the factors off the grid, and the recipe rounded as proposals are
rounded (:mod:`guardband.planner.space.rounding`) is judged too, with the
same models: what the lab can weigh may pass or fail where the given
amounts did not.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from guardband.planner.inputs.protocol import Protocol
from guardband.planner.inputs.runs import RunsTable
from guardband.planner.step.acquisition import all_values
from guardband.planner.step.batch import MIN_SEPARATION
from guardband.planner.step.plan import prepare_step
from guardband.planner.step.rates import objective_band
from guardband.planner.step.result import Mode, _num
from guardband.safety.screen import step_distance

__all__ = ["RecipeVerdict", "JudgeResult", "judge_points"]


@dataclass(frozen=True)
class RecipeVerdict:
    """What the models and the screen say about one recipe."""

    name: str
    x: np.ndarray
    inside: bool
    mean: float
    sd: float
    lo95: float
    hi95: float
    p: dict
    joint: float
    values: dict
    passes: bool
    reason: str
    detail: str
    off_grid: tuple[str, ...] = ()  # factors whose amount is not a multiple of their resolution
    rounded: "RecipeVerdict | None" = None  # the recipe rounded to the grid, judged (when off the grid)

    def to_dict(self, factor_names) -> dict:
        out = {"recipe": self.name, "x": {n: float(v) for n, v in zip(factor_names, self.x)},
               "inside_design_space": self.inside,
               "objective": {"mean": self.mean, "sd": self.sd, "lo95": self.lo95, "hi95": self.hi95},
               "p": {k: _num(v) for k, v in self.p.items()}, "joint": self.joint,
               "values": {k: _num(v) for k, v in self.values.items()},
               "passes": self.passes, "reason": self.reason, "detail": self.detail}
        if self.off_grid:
            out["off_grid"] = list(self.off_grid)
            out["rounded"] = self.rounded.to_dict(factor_names) if self.rounded is not None else None
        return out


@dataclass(frozen=True)
class JudgeResult:
    """Every recipe's verdict, with the step's mode, incumbent and model summaries."""

    verdicts: list[RecipeVerdict]
    mode: str
    incumbent: dict | None
    models: list
    messages: list[str]
    warm_start: dict
    resolution: str = ""  # the grid the recipes were checked against ("" when no factor states one)


def _near_in_progress(runs: RunsTable, U_runs, U, names) -> list[str]:
    """A note for each recipe within the batch separation of a run in progress."""
    busy = np.flatnonzero(runs.pending)
    out = []
    for i in range(U.shape[0]):
        d = step_distance(U_runs[busy], U[i : i + 1]) if busy.size else np.zeros(0)
        close = busy[d < MIN_SEPARATION]
        if close.size:
            ids = ", ".join(str(runs.run_ids[j]) for j in close)
            out.append(f"recipe {names[i]} is within the batch separation of run(s) in progress ({ids}): "
                       "it repeats a run already in the lab")
    return out


def judge_points(protocol: Protocol, runs: RunsTable, X, names, *, seed: int,
                 warm_start: dict | None = None) -> JudgeResult:
    """Judge the recipes ``X`` (rows, protocol units) named ``names``.

    Raises what :func:`.plan.prepare_step` raises (an empty design space, an
    objective model that cannot be fitted): a model that cannot be trusted
    makes the judgement refuse, as it makes the plan refuse.
    """
    from guardband.planner.space.rounding import off_grid, rounding_of  # here: the space package loads cvxpy

    X = np.atleast_2d(np.asarray(X, dtype=float))
    st = prepare_step(protocol, runs, seed=seed, warm_start=warm_start)
    verdicts, U, res_messages = _verdicts(st, X, names)
    messages = list(st.messages) + res_messages + _near_in_progress(runs, st.U_runs, U, names)
    rnd = rounding_of(protocol)
    if rnd.any:
        off = off_grid(X, rnd.resolution)
        rows = np.flatnonzero(off.any(axis=1))
        if rows.size:
            rounded, _, _ = _verdicts(st, rnd.round(X[rows]), [f"{names[i]} (rounded)" for i in rows])
            for i, r in zip(rows, rounded):
                verdicts[i] = replace(verdicts[i], off_grid=tuple(protocol.factor_names[j]
                                                                  for j in np.flatnonzero(off[i])), rounded=r)
                messages.append(_off_grid_note(verdicts[i], protocol, rnd))
    if st.mode == Mode.FEASIBILITY_FIRST:
        messages.append("no run meets every limit yet: EI and PI have no incumbent to improve on")
    return JudgeResult(verdicts, st.mode, st.incumbent, st.ctx.models.summaries, messages, st.warm_start,
                       rnd.describe() if rnd.any else "")


def _verdicts(st, X, names) -> tuple[list[RecipeVerdict], np.ndarray, list[str]]:
    """The verdicts of the points X with the models and screen of a prepared step, their unit
    coordinates and the screen's messages."""
    U, mu, sd, lims = st.ctx.predict(X)
    res = st.ctx.screen(X, U, lims)
    values = all_values(mu, sd, st.inc_value, **st.rank_kw)
    hard = st.ctx.hard(X, U)
    mean, sd_shown, lo95, hi95 = objective_band(mu, sd, st.rank_kw.get("scale"))  # a binomial objective: its rate
    verdicts = [
        RecipeVerdict(name=str(names[i]), x=X[i].copy(), inside=bool(hard.inside[i]), mean=float(mean[i]),
                      sd=float(sd_shown[i]), lo95=float(lo95[i]), hi95=float(hi95[i]),
                      p={n: float(res.P[i, j]) for j, n in enumerate(res.limit_names)},
                      joint=float(res.joint[i]), values={k: float(v[i]) for k, v in values.items()},
                      passes=bool(res.survives[i]), reason=str(res.reason[i]) or "passes",
                      detail=res.detail[i] or "")
        for i in range(X.shape[0])
    ]
    return verdicts, U, list(res.messages)


def _off_grid_note(v: RecipeVerdict, protocol: Protocol, rnd) -> str:
    """A sentence on a recipe off the resolution grid: which amounts, and what its rounding gets."""
    idx = [protocol.factor_names.index(n) for n in v.off_grid]
    amounts = ", ".join(f"{protocol.factor_names[j]} {v.x[j]:.10g} (resolution {rnd.resolution[j]:g})"
                        for j in idx)
    changed = ", ".join(f"{n} {v.rounded.x[j]:.10g}" for j, n in enumerate(protocol.factor_names)
                        if v.rounded.x[j] != v.x[j])
    verdict = "passes" if v.rounded.passes else f"fails ({v.rounded.reason})"
    return (f"recipe {v.name} is off the resolution grid: {amounts}; it is judged as given, and rounded as "
            f"proposals are ({changed}) it {verdict}")
