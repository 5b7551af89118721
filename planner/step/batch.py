"""The batch: pick, fantasise, re-screen, re-rank, one pick at a time.

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

How a later pick is valued (``[batch] method``), for the ei and pi rules
once a run has met every limit:

``sampled``
    The earlier picks' objective results are drawn, ``SAMPLES`` times, from
    their joint predictive distribution (a scrambled Sobol set of normal
    draws, seeded by the step, and its mirror image, pushed through the rank-one updates of
    :class:`~guardband.planner.models.gp.PosteriorAt`); in each draw the
    best result so far is the incumbent, and a candidate's value is its ei
    (or pi) averaged over the draws. This is the greedy form of the
    multi-point expected improvement (Ginsbourger, Le Riche & Carraro 2010;
    computed by sampling as in Wilson, Hutter & Deisenroth 2018; both from
    memory): a pick beside an earlier one keeps the value of the chance
    that the earlier one disappoints, instead of losing it all. Runs in
    progress are drawn the same way and so count for each draw's incumbent.
``believer``
    Each earlier pick comes out at its posterior mean, which also moves the
    incumbent (the kriging believer above, the only method before).
``explore`` (the default)
    The first pick as under ``sampled``; each later pick is the candidate
    whose objective sd, given the fantasised results of the earlier picks,
    is largest among the candidates that pass the screen and lie in the
    *relevant region*: those whose optimistic bound (``mean + kappa sd``
    when maximising, ``mean - kappa sd`` when minimising; ``kappa`` of
    ``[ranking]``) reaches the best pessimistic bound among the screen's
    survivors when the batch starts. This is the pure-exploration half of
    UCB-PE (Contal, Buffoni, Robicquet & Vayatis 2013, from memory): the
    posterior variance after conditioning does not depend on the fantasised
    values, so the later picks are spread where the model is least sure
    among the candidates that could still be the best, rather than beside
    the first pick. When no candidate of that region is left (too close,
    or excluded by the re-screen) the pick falls back to the ``sampled``
    ranking. The values shown for each pick, and ``least_worth``, are the
    ``sampled`` ones. Applies once a run has met every limit, for every
    ranking rule; before, picks are ranked by the joint figure as under
    the other methods.

Under ``sampled`` and ``believer`` the bound and mean rules, and the joint
figure while no run has met every limit, value picks alike (their average
over the draws is their value at the mean); ``explore`` chooses its later
picks by the objective's sd once a run has met every limit, whatever the
rule. With ``[batch] least_worth`` above 0, the batch stops before a later
pick whose ei (or pi) given the earlier picks is below that share of the
first pick's, and says so (under ``explore`` too: a pick made to learn is
judged by its sampled ei); a batch size asked for explicitly is always
filled.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
from scipy.special import logsumexp, ndtri

from guardband.planner.step.acquisition import all_values, score as rule_score, weighted_by_joint
from guardband.planner.step.context import StepContext
from guardband.safety.screen import ScreenResult, step_distance

__all__ = ["Pool", "BatchRule", "greedy_batch", "relevant_region", "MIN_SEPARATION", "SAMPLES", "VALUED_RULES"]

#: Smallest distance between two runs of one batch (unit-scaled, per sqrt(factor)).
MIN_SEPARATION = 0.01
#: Draws of the earlier picks' results under the sampled method (a power of 2, for the Sobol set).
SAMPLES = 128
#: Rules whose value given the earlier picks the method and ``least_worth`` act on.
VALUED_RULES = ("ei", "pi")


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

    def direction(self) -> np.ndarray:
        """How the objective's mean moves per unit surprise of the latest fantasised point."""
        return self.objective.fantasy_direction()

    def rescreen(self):
        """The pool screened under the fantasies: (result, mean, sd)."""
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            mu_f, sd_f = _Head(self.objective, self.n).mean_sd()
            lims_f = self.ctx.limit_predictions(None, [None if lp is None else _Head(lp, self.n)
                                                       for lp in self.limits])
        return self.ctx.screen(self.pool.X, self.pool.U, lims_f), mu_f, sd_f


class _Draws:
    """The sampled method: per draw, how far the objective's mean has moved and the incumbent."""

    def __init__(self, n_points: int, dims: int, rng, incumbent: float, maximize: bool):
        from scipy.stats import qmc  # here: scipy.stats takes about 0.4 s to import

        sobol = qmc.Sobol(d=max(dims, 1), scramble=True, seed=rng)
        half = ndtri(np.clip(sobol.random(SAMPLES // 2), 1e-12, 1.0 - 1e-12))
        self.e = np.vstack([half, -half])  # (SAMPLES, dims), antithetic: the draws average to 0
        self.shift = np.zeros((SAMPLES, n_points))
        self.inc = np.full(SAMPLES, float(incumbent))
        self.maximize, self.k = maximize, 0

    def add(self, j: int, direction: np.ndarray, mean_j: float) -> None:
        """Point j was conditioned on: each draw's result there moves every mean and may be its best."""
        self.shift += np.outer(self.e[:, self.k], direction)
        self.k += 1
        at_j = mean_j + self.shift[:, j]
        self.inc = np.maximum(self.inc, at_j) if self.maximize else np.minimum(self.inc, at_j)

    def scores(self, rule: str, mu, sd, rank_kw: dict) -> np.ndarray:
        """log of the rule's value averaged over the draws, at the pool points (mu, sd under the fantasies)."""
        n = mu.shape[0]
        logs = rule_score(rule, mu[None, :] + self.shift[:, :n], sd[None, :], self.inc[:, None], **rank_kw)
        return logsumexp(logs, axis=0) - np.log(SAMPLES)

    def values(self, j: int, mu_j: float, sd_j: float, rank_kw: dict) -> dict:
        """Every rule's value at pool point j: ei and pi averaged over the draws, the others at the mean
        (their average over the draws)."""
        v = all_values(mu_j + self.shift[:, j], np.full(SAMPLES, sd_j), self.inc, **rank_kw)
        at_mean = all_values(np.array([mu_j]), np.array([sd_j]), None, **rank_kw)
        return {k: float(np.mean(a)) if k in VALUED_RULES else float(at_mean[k][0]) for k, a in v.items()}


def relevant_region(mu: np.ndarray, sd: np.ndarray, survives: np.ndarray, kappa: float,
                    maximize: bool) -> np.ndarray:
    """Candidates whose optimistic bound reaches the best pessimistic bound among the survivors.

    Maximising: ``mu + kappa sd >= max over survivors of (mu - kappa sd)``;
    minimising, the mirror image. Only survivors can be in the region; none
    when nothing survives.
    """
    if not np.any(survives):
        return np.zeros(mu.shape[0], dtype=bool)
    g = mu if maximize else -mu
    best_pessimistic = float(np.max(g[survives] - kappa * sd[survives]))
    return survives & (g + kappa * sd >= best_pessimistic)


@dataclass
class BatchRule:
    """How the batch values later picks, and when it stops: from ``[batch]`` and the ranking."""

    method: str = "believer"
    rule: str = "ei"
    rank_kw: dict | None = None
    least_worth: float = 0.0
    rng: object = None
    weigh_by_joint: bool = False

    @classmethod
    def of(cls, protocol, rank_kw: dict, *, rng=None, forced: bool = False, weigh_by_joint: bool = False):
        """The protocol's method and least worth (none when the batch size was asked for: ``forced``)."""
        return cls(protocol.batch.method, protocol.ranking.rule, dict(rank_kw),
                   0.0 if forced else protocol.batch.least_worth, rng, weigh_by_joint)

    def valued(self, incumbent_value) -> bool:
        return incumbent_value is not None and self.rule in VALUED_RULES and self.rank_kw is not None

    def sampled(self, incumbent_value) -> bool:
        """Are later picks valued over sampled results (the sampled and explore methods)?"""
        return self.method in ("sampled", "explore") and self.valued(incumbent_value)

    def explores(self, incumbent_value) -> bool:
        """Are later picks chosen by the objective's sd in the relevant region?"""
        return self.method == "explore" and incumbent_value is not None and self.rank_kw is not None


def _worth(g: dict, rule: BatchRule) -> float:
    """The rule's value of a pick given the earlier ones, in its own units."""
    if "values" in g:
        return g["values"][rule.rule]
    v = all_values(np.array([g["mean"]]), np.array([g["sd"]]), g["incumbent"], **rule.rank_kw)
    return float(v[rule.rule][0])


def _stop_message(k: int, count: int, worth: float, first: float, rule: BatchRule) -> str:
    return (f"the batch stopped at {k} of {count} runs: pick {k + 1} would be worth {rule.rule} {worth:.3g} "
            f"given the fantasised results of the earlier picks, {worth / first:.2g} of the first pick's "
            f"{first:.3g}, below batch.least_worth {rule.least_worth:g}; asking for the batch size "
            "(--count) fills it regardless")


def _choose(ok: np.ndarray, scores, sd: np.ndarray, region) -> tuple[int, int | None]:
    """The pick among the eligible candidates ``ok``: the best of ``scores()`` or, with a
    ``region`` that holds an eligible candidate, the largest sd there (ties to the lowest
    index); and how many eligible candidates the region held (None when it was not used).
    ``scores`` is called only when the rule ranks: under the sampled values it is the
    costliest part of a later pick, and an exploring pick does not need it."""
    if region is not None and np.any(ok & region):
        idx = np.flatnonzero(ok & region)
        return int(idx[np.lexsort((idx, -sd[idx]))[0]]), int(idx.size)
    idx = np.flatnonzero(ok)
    ranked = scores()
    return int(idx[np.lexsort((idx, -ranked[idx]))[0]]), None


def greedy_batch(ctx: StepContext, pool: Pool, count: int, scores_of, incumbent_value,
                 maximize: bool, U_busy=None, rule: BatchRule | None = None
                 ) -> tuple[list[int], list[str], list[dict]]:
    """Indices of the chosen candidates, in order, messages, and for each pick what it was
    chosen on: its objective mean and sd under the fantasies of the runs in progress and
    the earlier picks, the incumbent then, its joint figure then, how many candidates
    were still eligible, (sampled and explore methods) its rule values averaged over the
    draws, and (explore method, later picks) how many eligible candidates the relevant
    region held (``region``; None when the pick was ranked by the rule).

    ``scores_of(mu, sd, result, incumbent)`` ranks candidates (larger is better).
    ``U_busy`` (unit-scaled) are the runs in progress: every model is
    conditioned on them first, as on earlier picks, and no pick lies within
    MIN_SEPARATION of one; under the believer method they do not move the
    incumbent (no result yet). ``rule`` (default: the believer, never
    stopping early) is the method and the least worth.
    """
    rule = rule or BatchRule()
    U_busy = np.zeros((0, pool.U.shape[1])) if U_busy is None else np.asarray(U_busy, dtype=float)
    n_busy = U_busy.shape[0]
    draws = None
    if rule.sampled(incumbent_value) and (count > 1 or n_busy):
        draws = _Draws(pool.U.shape[0] + n_busy, n_busy + count, rule.rng, incumbent_value, maximize)

    def drawn_scores(mu, sd, res, _inc):  # the sampled method ranks by the rule averaged over the draws
        scores = draws.scores(rule.rule, mu, sd, rule.rank_kw)
        return weighted_by_joint(scores, res.joint) if rule.weigh_by_joint else scores

    def rescreen(fant, inc):  # (result, scores on demand, mean, sd) under the fantasies
        result, mu, sd = fant.rescreen()
        rank = scores_of if draws is None else drawn_scores
        return result, lambda: rank(mu, sd, result, inc), mu, sd

    chosen: list[int] = []
    messages: list[str] = []
    fant = None
    cur_result, cur_scores, cur_mu, cur_sd = pool.result, lambda: pool.scores, pool.mu, pool.sd
    fantasy_inc = incumbent_value
    given: list[dict] = []
    too_close = np.zeros(pool.X.shape[0], dtype=bool)
    if n_busy:
        for u in U_busy:
            too_close |= step_distance(pool.U, u[None, :]) < MIN_SEPARATION
        fant = _Fantasies(ctx, pool, U_busy)
        for j in range(n_busy):
            f_mu = fant.add(pool.U.shape[0] + j)
            if draws is not None:
                draws.add(pool.U.shape[0] + j, fant.direction(), f_mu)
        cur_result, cur_scores, cur_mu, cur_sd = rescreen(fant, fantasy_inc)
    region = None  # the explore method's relevant region, fixed when the batch starts
    if rule.explores(incumbent_value):
        region = relevant_region(cur_mu, cur_sd, pool.result.survives & cur_result.survives,
                                 float(rule.rank_kw["kappa"]), maximize)
    for k in range(count):
        ok = pool.result.survives & cur_result.survives & ~too_close
        if not np.any(ok):
            messages.append(_shortfall_message(k, count))
            break
        best, in_region = _choose(ok, cur_scores, cur_sd, region if k else None)
        g = {"mean": float(cur_mu[best]), "sd": float(cur_sd[best]),
             "incumbent": fantasy_inc if draws is None else incumbent_value,
             "joint": float(cur_result.joint[best]), "eligible": int(np.count_nonzero(ok)),
             "earlier": k, "in_progress": n_busy, "sampled": draws is not None, "region": in_region}
        if draws is not None:
            g["values"] = draws.values(best, float(cur_mu[best]), float(cur_sd[best]), rule.rank_kw)
        if k and rule.least_worth > 0 and rule.valued(incumbent_value):
            worth, first = _worth(g, rule), _worth(given[0], rule)
            if worth < rule.least_worth * first:
                messages.append(_stop_message(k, count, worth, first, rule))
                break
        chosen.append(best)
        given.append(g)
        if k + 1 == count:
            break
        # a batch never holds two runs closer than MIN_SEPARATION
        too_close |= step_distance(pool.U, pool.U[best : best + 1]) < MIN_SEPARATION
        if fant is None:  # posteriors over the pool, updated by rank one per pick
            fant = _Fantasies(ctx, pool, U_busy)
        f_mu = fant.add(best)
        if draws is not None:
            draws.add(best, fant.direction(), f_mu)
        # kriging believer: the fantasised result also counts for the
        # incumbent, so the next pick must improve on it
        if fantasy_inc is not None:
            fantasy_inc = max(fantasy_inc, f_mu) if maximize else min(fantasy_inc, f_mu)
        cur_result, cur_scores, cur_mu, cur_sd = rescreen(fant, fantasy_inc)
    return chosen, messages, given
