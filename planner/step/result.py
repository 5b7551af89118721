"""What one planning step decided: the proposals, the screen, the models' summaries.

:class:`PlanResult` is the step's whole outcome; :meth:`PlanResult.record_body`
is what the decision log keeps of it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np

from guardband.planner import __version__
from guardband.planner.inputs.protocol import Protocol
from guardband.planner.settings import NEAR_MISS_COUNT
from guardband.safety.limits import ScreenRules

if TYPE_CHECKING:
    from guardband.safety.screen import ScreenResult

__all__ = ["ModelSummary", "Proposal", "PlanResult", "Scaler", "Mode", "ModelStatus"]


class Mode:
    """What a step ranks by."""

    IMPROVE = "improve"
    FEASIBILITY_FIRST = "feasibility-first"


class ModelStatus:
    """The status of one response's model."""

    OK = "ok"
    TOO_FEW_RUNS = "too-few-runs"
    NOT_FITTED = "model-not-fitted"


class Scaler:
    """Map protocol units to the unit cube of the free factors."""

    def __init__(self, space):
        self.space = space
        self.free = np.asarray(space.free, dtype=bool)

    def unit(self, X) -> np.ndarray:
        return np.asarray(self.space.to_unit(np.atleast_2d(X)))[:, self.free]


@dataclass(frozen=True)
class ModelSummary:
    """What was fitted for one response, for the log and the report."""

    response: str
    role: str  # "objective" or "limit"
    n_runs: int
    status: str  # "ok", "too-few-runs", "model-not-fitted"
    message: str
    hyperparameters: dict | None = None
    log_marginal_likelihood: float | None = None
    prior_mean: float | None = None
    loo_coverage: float | None = None  # share of measured values inside their LOO 95% interval
    loo_rmse: float | None = None
    sd_factor: float | None = None  # limit models: predictive sd widened by this (leave-one-out check)
    short_factor: float | None = None  # limit models: length-scale multiplier of the short model
    local_factor: float | None = None  # limit models: largest local widening at the runs

    def to_dict(self) -> dict:
        return dict(self.__dict__)


@dataclass(frozen=True)
class Proposal:
    """One proposed run with what the models (fitted to real data) say about it."""

    rank: int
    x: np.ndarray
    origin: str  # "pool", "local" or "refined"
    mean: float
    sd: float
    lo95: float
    hi95: float
    p: dict[str, float]
    joint: float
    values: dict[str, float]  # ei, pi, bound, mean
    score: float
    #: the four values on the models conditioned on the earlier picks (and runs in
    #: progress), which the pick was chosen on, and a one-line reason (:mod:`.explain`)
    given_earlier: dict = field(default_factory=dict)
    reason: str = ""


@dataclass(frozen=True)
class PlanResult:
    """Everything one planning step decided, and why."""

    protocol: Protocol
    factor_names: tuple[str, ...]
    seed: int
    mode: str  # "improve" or "feasibility-first"
    incumbent: dict | None
    proposals: list[Proposal]
    pool: np.ndarray
    origin: np.ndarray
    screen: ScreenResult
    scores: np.ndarray
    models: list[ModelSummary]
    messages: list[str]
    warm_start: dict
    runs_sha256: str
    n_runs_used: int
    #: runs in progress (factors set, nothing measured): they shaped the batch
    n_in_progress: int
    flags: tuple[str, ...] = field(default=())
    version: str = __version__
    #: What each ranking rule would propose, and what each threshold costs
    #: (:mod:`.attitudes`); empty when the step was asked not to explain.
    rule_picks: list = field(default_factory=list)
    threshold_price: list = field(default_factory=list)
    #: Fitted models by response name (None where a limit could not vouch), and
    #: the design space; for reports and diagnostics, not part of the record.
    fitted: dict = field(default_factory=dict, repr=False, compare=False)
    space: object = field(default=None, repr=False, compare=False)

    def __repr__(self) -> str:
        counts = ", ".join(f"{k} {v}" for k, v in self.counts().items() if v)
        return (f"PlanResult({self.protocol.study.title!r}: {len(self.proposals)} proposal(s), mode "
                f"{self.mode}, seed {self.seed}, {self.pool.shape[0]} candidates: {counts})")

    def unit(self, X) -> np.ndarray:
        """Protocol units -> the unit-cube coordinates the models take."""
        return Scaler(self.space).unit(X)

    def limit_figures(self, X) -> tuple[np.ndarray, np.ndarray]:
        """The screen's per-limit probabilities and joint figure at points X (protocol units).

        The same functions as the plan's screen (:mod:`guardband.safety.screen`),
        on the models fitted to real data: NaN and 0 (fail closed) where a
        limit has no model.
        """
        from guardband.safety.screen import figures_at, limit_predictions  # scipy.special: on use

        X = np.atleast_2d(np.asarray(X, dtype=float))
        rules = ScreenRules.from_protocol(self.protocol)
        models = [self.fitted.get(lim.name) for lim in rules.limits]
        unavailable = [(s.status, s.message) for s in self.models if s.role == "limit"]
        if X.shape[0] == 0:
            return np.zeros((0, len(rules.limits))), np.zeros(0)
        preds = limit_predictions(rules.limits, models, self.unit(X), unavailable=unavailable)
        return figures_at(preds, X.shape[0], method=rules.joint)

    def counts(self) -> dict[str, int]:
        return self.screen.counts()

    def near_misses(self, count: int = NEAR_MISS_COUNT) -> list[dict]:
        """The excluded candidates with the highest joint figures, with every limit's probability.

        Ranked by the joint figure (the screen's own measure of how near a
        candidate came to passing every limit at once), then by score; not
        by the margin of the first rule that failed, which says nothing about
        the other limits.
        """
        excluded = np.flatnonzero(~self.screen.survives & (self.screen.reason != "outside-design-space"))
        joint = np.nan_to_num(np.asarray(self.screen.joint, dtype=float)[excluded], nan=-1.0)
        score = np.nan_to_num(np.asarray(self.scores, dtype=float)[excluded], nan=-np.inf)
        order = excluded[np.lexsort((excluded, -score, -joint))]
        out = []
        for i in order[:count]:
            out.append(self._candidate_dict(int(i)))
        return out

    def _candidate_dict(self, i: int) -> dict:
        s = self.screen
        return {
            "candidate": i,
            "x": {n: float(v) for n, v in zip(self.factor_names, self.pool[i])},
            "origin": str(self.origin[i]),
            "reason": str(s.reason[i]),
            "detail": s.detail[i],
            "p": {n: _num(s.P[i, j]) for j, n in enumerate(s.limit_names)},
            "joint": float(s.joint[i]),
            "step": _num(s.step[i]),
            "score": _num(self.scores[i]),
        }

    def hyperparameters(self) -> dict:
        return {m.response: m.hyperparameters for m in self.models if m.hyperparameters is not None}

    def proposal_dicts(self) -> list[dict]:
        out = []
        for p in self.proposals:
            out.append(
                {
                    "rank": p.rank,
                    "x": {n: float(v) for n, v in zip(self.factor_names, p.x)},
                    "origin": p.origin,
                    "objective": {"mean": p.mean, "sd": p.sd, "lo95": p.lo95, "hi95": p.hi95},
                    "p": dict(p.p),
                    "joint": p.joint,
                    "values": dict(p.values),
                    "score": p.score,
                    "given_earlier": dict(p.given_earlier),
                    "reason": p.reason,
                }
            )
        return out

    def record_body(self) -> dict:
        """The JSON-able body of this step's decision-log record."""
        return {
            "tool_version": self.version,
            "protocol_fingerprint": self.protocol.fingerprint,
            "runs_sha256": self.runs_sha256,
            "seed": self.seed,
            "mode": self.mode,
            "ranking_rule": self.protocol.ranking.rule if self.mode == "improve" else "joint",
            "threshold": self.protocol.screen.threshold,
            "joint_method": self.protocol.screen.joint,
            "incumbent": self.incumbent,
            "n_runs_used": self.n_runs_used,
            "n_in_progress": self.n_in_progress,
            "n_candidates": int(self.pool.shape[0]),
            "counts": self.counts(),
            "models": [m.to_dict() for m in self.models],
            "warm_start": self.warm_start,
            "proposals": self.proposal_dicts(),
            "near_misses": self.near_misses(),
            "rule_picks": list(self.rule_picks),
            "threshold_price": list(self.threshold_price),
            "messages": list(self.messages),
            "flags": list(self.flags),
        }


def _num(v) -> float | None:
    v = float(v)
    return v if np.isfinite(v) else None
