"""The greedy batch: pick, fantasise, re-screen, re-rank.

Take the best survivor, condition every model on its fantasised results,
re-screen and re-rank, repeat. The objective's fantasy is its posterior mean
("kriging believer", which also updates the incumbent). A limit's fantasy is
pessimistic: the value at the limit's own required probability on the side
of the limit (for an upper limit, ``mean + z_p sd`` with ``z_p`` the normal
quantile of the required probability), a "constant liar" in the sense of
Ginsbourger, Le Riche & Carraro (2010, from memory) that lies towards the
limit. Under it a later pick next to an earlier one must be safe even if the
earlier one comes out as badly as its promise allows, so one hopeful region
of a limit model cannot claim several runs of a batch. Two runs of one batch are never closer than
MIN_SEPARATION. Runs in progress (factors set, nothing measured yet) are
treated as picks made before the batch: every model is conditioned on
their fantasies first, and no pick lies within MIN_SEPARATION of one; they
do not move the incumbent (they have no result). A candidate must pass the screen under the models fitted to
real data *and* under the models with the fantasies, so fantasised data can
never admit a candidate that the real data would exclude.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
from scipy.special import ndtri

from guardband.planner.step.context import StepContext
from guardband.safety.screen import ScreenResult, step_distance

__all__ = ["Pool", "greedy_batch", "MIN_SEPARATION"]

#: Smallest distance between two runs of one batch (unit-scaled, per sqrt(factor)).
MIN_SEPARATION = 0.01


@dataclass(frozen=True)
class Pool:
    """The screened candidate pool under the models fitted to real data."""

    X: np.ndarray
    U: np.ndarray
    mu: np.ndarray
    sd: np.ndarray
    result: ScreenResult
    scores: np.ndarray


def _shortfall_message(k: int, count: int) -> str:
    if k == 0:
        return "no candidate passed the safety screen; nothing is proposed"
    return (f"only {k} of the {count} requested runs passed the screen once the earlier "
            "proposals' fantasised results were added")


def _pessimistic_value(rule, posterior, j: int) -> float:
    """The fantasised value of a limited response at pool point j: towards the limit."""
    mean, sd = posterior.mean_sd(include_noise=rule.with_noise)
    m, s = float(mean[j]), float(sd[j])
    z = float(ndtri(rule.probability))
    if rule.upper is not None and rule.lower is not None:
        towards_upper = (rule.upper - m) <= (m - rule.lower)
        return m + z * s if towards_upper else m - z * s
    return m + z * s if rule.upper is not None else m - z * s


class _Head:
    """A posterior over ``n`` pool points followed by other points: shows only the pool points."""

    def __init__(self, posterior, n: int):
        self._posterior, self._n = posterior, n

    @property
    def n_points(self) -> int:
        return self._n

    def mean_sd(self, *, include_noise: bool = False):
        mean, sd = self._posterior.mean_sd(include_noise=include_noise)
        return mean[: self._n], sd[: self._n]

    def condition(self, j: int, y_j: float) -> None:
        self._posterior.condition(j, y_j)

    @property
    def points(self):
        return self._posterior.points[: self._n]

    def __getattr__(self, name):  # the posterior's parts, cut to the pool points
        if name == "mean_sd_parts" and hasattr(self._posterior, name):
            def parts(*, include_noise: bool = False):
                return tuple(a[: self._n] for a in self._posterior.mean_sd_parts(include_noise=include_noise))
            return parts
        if name in ("runs_view", "lattice_prediction") and hasattr(self._posterior, name):
            return getattr(self._posterior, name)  # the fitted model's, not point-wise
        raise AttributeError(name)


class _Fantasies:
    """Every model's posterior over the pool (and the runs in progress), conditioned on fantasies."""

    def __init__(self, ctx: StepContext, pool: Pool, U_busy: np.ndarray):
        self.ctx, self.pool, self.n = ctx, pool, pool.U.shape[0]
        U = np.vstack([pool.U, U_busy]) if U_busy.shape[0] else pool.U
        self.objective = ctx.models.objective.posterior_at(U)
        self.limits = [None if lm is None else lm.posterior_at(U) for lm in ctx.models.limits]

    def add(self, j: int) -> float:
        """Fantasise results at point j: the objective at its posterior mean (returned),
        each limit towards the limit."""
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            f_mu = float(self.objective.mean_sd()[0][j])
            self.objective.condition(j, f_mu)
            for rule, lp in zip(self.ctx.rules.limits, self.limits):
                if lp is not None:
                    lp.condition(j, _pessimistic_value(rule, lp, j))
        return f_mu

    def rescreen(self, scores_of, incumbent_value):
        """The pool screened and ranked under the fantasies: (result, scores, mean, sd)."""
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            mu_f, sd_f = _Head(self.objective, self.n).mean_sd()
            lims_f = self.ctx.limit_predictions(None, [None if lp is None else _Head(lp, self.n)
                                                       for lp in self.limits])
        result = self.ctx.screen(self.pool.X, self.pool.U, lims_f)
        return result, scores_of(mu_f, sd_f, result, incumbent_value), mu_f, sd_f


def greedy_batch(ctx: StepContext, pool: Pool, count: int, scores_of, incumbent_value,
                 maximize: bool, U_busy=None) -> tuple[list[int], list[str], list[dict]]:
    """Indices of the chosen candidates, in order, messages, and for each pick what it was
    chosen on: its objective mean and sd under the fantasies of the runs in progress and
    the earlier picks, the incumbent then, its joint figure then, and how many candidates
    were still eligible.

    ``scores_of(mu, sd, result, incumbent)`` ranks candidates (larger is better).
    ``U_busy`` (unit-scaled) are the runs in progress: every model is
    conditioned on them first, as on earlier picks, and no pick lies within
    MIN_SEPARATION of one; they do not move the incumbent (no result yet).
    """
    U_busy = np.zeros((0, pool.U.shape[1])) if U_busy is None else np.asarray(U_busy, dtype=float)
    chosen: list[int] = []
    messages: list[str] = []
    fant = None
    cur_result, cur_scores, cur_mu, cur_sd = pool.result, pool.scores, pool.mu, pool.sd
    fantasy_inc = incumbent_value
    given: list[dict] = []
    too_close = np.zeros(pool.X.shape[0], dtype=bool)
    if U_busy.shape[0]:
        for u in U_busy:
            too_close |= step_distance(pool.U, u[None, :]) < MIN_SEPARATION
        fant = _Fantasies(ctx, pool, U_busy)
        for j in range(U_busy.shape[0]):
            fant.add(pool.U.shape[0] + j)
        cur_result, cur_scores, cur_mu, cur_sd = fant.rescreen(scores_of, fantasy_inc)
    for k in range(count):
        ok = pool.result.survives & cur_result.survives & ~too_close
        if not np.any(ok):
            messages.append(_shortfall_message(k, count))
            break
        idx = np.flatnonzero(ok)
        best = int(idx[np.lexsort((idx, -cur_scores[idx]))[0]])
        chosen.append(best)
        given.append({"mean": float(cur_mu[best]), "sd": float(cur_sd[best]), "incumbent": fantasy_inc,
                      "joint": float(cur_result.joint[best]), "eligible": int(idx.size),
                      "earlier": k, "in_progress": int(U_busy.shape[0])})
        if k + 1 == count:
            break
        # a batch never holds two runs closer than MIN_SEPARATION
        too_close |= step_distance(pool.U, pool.U[best : best + 1]) < MIN_SEPARATION
        if fant is None:  # posteriors over the pool, updated by rank one per pick
            fant = _Fantasies(ctx, pool, U_busy)
        f_mu = fant.add(best)
        # kriging believer: the fantasised result also counts for the
        # incumbent, so the next pick must improve on it
        if fantasy_inc is not None:
            fantasy_inc = max(fantasy_inc, f_mu) if maximize else min(fantasy_inc, f_mu)
        cur_result, cur_scores, cur_mu, cur_sd = fant.rescreen(scores_of, fantasy_inc)
    return chosen, messages, given
