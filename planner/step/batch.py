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
MIN_SEPARATION. A candidate must pass the screen under the models fitted to
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


def greedy_batch(ctx: StepContext, pool: Pool, count: int, scores_of, incumbent_value,
                 maximize: bool) -> tuple[list[int], list[str]]:
    """Indices of the chosen candidates, in order, and messages.

    ``scores_of(mu, sd, result, incumbent)`` ranks candidates (larger is better).
    """
    chosen: list[int] = []
    messages: list[str] = []
    obj_f = lim_f = None
    cur_result, cur_scores = pool.result, pool.scores
    fantasy_inc = incumbent_value
    too_close = np.zeros(pool.X.shape[0], dtype=bool)
    for k in range(count):
        ok = pool.result.survives & cur_result.survives & ~too_close
        if not np.any(ok):
            messages.append(_shortfall_message(k, count))
            break
        idx = np.flatnonzero(ok)
        best = int(idx[np.lexsort((idx, -cur_scores[idx]))[0]])
        chosen.append(best)
        if k + 1 == count:
            break
        # a batch never holds two runs closer than MIN_SEPARATION
        too_close |= step_distance(pool.U, pool.U[best : best + 1]) < MIN_SEPARATION
        if obj_f is None:  # posteriors over the pool, updated by rank one per pick
            obj_f = ctx.models.objective.posterior_at(pool.U)
            lim_f = [None if lm is None else lm.posterior_at(pool.U) for lm in ctx.models.limits]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            f_mu = float(obj_f.mean_sd()[0][best])
            obj_f.condition(best, f_mu)
            # kriging believer: the fantasised result also counts for the
            # incumbent, so the next pick must improve on it
            if fantasy_inc is not None:
                fantasy_inc = max(fantasy_inc, f_mu) if maximize else min(fantasy_inc, f_mu)
            for rule, lp in zip(ctx.rules.limits, lim_f):
                if lp is not None:
                    lp.condition(best, _pessimistic_value(rule, lp, best))
            mu_f, sd_f = obj_f.mean_sd()
            lims_f = ctx.limit_predictions(None, lim_f)
        cur_result = ctx.screen(pool.X, pool.U, lims_f)
        cur_scores = scores_of(mu_f, sd_f, cur_result, fantasy_inc)
    return chosen, messages
