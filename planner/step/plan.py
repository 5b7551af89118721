"""One planning step: models, candidate pool, safety screen, ranking, batch.

A planning step is a pure function of (protocol, runs, seed, warm start,
tool version): the same inputs give the same plan, byte for byte.

The flow (see DESIGN.md):

1. the design space from the protocol; refuse when it is empty;
2. one GP per response on the measured runs (factors scaled to the unit
   cube, fixed factors dropped); a limit model's prior mean sits at its
   limit; a limit with too few runs, or whose model cannot be fitted,
   vouches for nothing (fail closed); a limit model that its own
   leave-one-out check finds overconfident is widened
   (``screen.widen_from_loo``), and it is paired with its shortest
   plausible length scales, the screen taking the worse of the two
   (``screen.short_model``); see :mod:`.fitting`;
3. a candidate pool from the hit-and-run sampler, plus candidates between
   the runs that met every limit and pool points (convex combinations stay
   inside the polytope), plus a local refinement of the best candidates;
   when no candidate passes, a local search for the highest probabilities
   of meeting the limits (their product) from the closest ones (its points
   are screened like any other);
   (:mod:`.pool`, :mod:`.refine`); where factors state a ``resolution``,
   every candidate is then rounded to it and screened again
   (:mod:`guardband.planner.space.rounding`), so only amounts that can be
   weighed are proposed;
4. the safety screen on the pool (:mod:`guardband.safety.screen`, through
   :class:`.context.StepContext`);
5. the incumbent is the best measured objective among runs that met every
   limit; with none, the step ranks by the joint figure (feasibility first)
   and says so;
6. the batch is chosen one pick at a time with fantasised results
   (:mod:`.batch`; later picks valued by ``batch.method``, the batch
   stopped early by ``batch.least_worth``), after conditioning every model
   on the runs in progress (factors set, nothing measured yet) as on
   earlier picks.
   Every value shown for a proposal comes from the models fitted to real
   data.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from guardband.planner.errors import ProtocolError
from guardband.planner.inputs.protocol import Protocol
from guardband.planner.inputs.runs import RunsTable
from guardband.planner.step.acquisition import all_values, score as rule_score, weighted_by_joint
from guardband.planner.step.attitudes import rule_picks, threshold_price
from guardband.planner.step.batch import VALUED_RULES, BatchRule, Pool, greedy_batch
from guardband.planner.step.context import StepContext
from guardband.planner.step.fitting import MIN_OBJECTIVE_RUNS, fit_models, stated_sd_contradicted
from guardband.planner.step.pool import candidate_pool
from guardband.planner.step.explain import closest_miss, pick_explanations, unlikely_to_improve
from guardband.planner.step.rates import objective_band, objective_scale, rate_incumbent
from guardband.planner.step.refine import refine, rescue_figure
from guardband.planner.step.result import Mode, PlanResult, Proposal, Scaler, _num
from guardband.safety.limits import ScreenRules, limit_rules, meets_limits
from guardband.safety.span import span_streak

__all__ = ["plan_step", "prepare_step", "PreparedStep", "safe_runs_mask", "MIN_OBJECTIVE_RUNS"]

#: When no pool candidate passes the screen, the local search for the
#: highest probabilities of meeting the limits starts from this many of the
#: closest candidates.
RESCUE_STARTS = 6
#: The most candidates one step draws when the search grows with the batch (``batch.search_per_run``).
MAX_POOL = 500_000
#: The search grows with the batch only while candidates x measured runs stay within this
#: (the default pool of 4,000 at 300 runs): each candidate is predicted from every run, so
#: beyond it a wider search would make a large data set's step several times slower.
SEARCH_BUDGET = 1_200_000


def safe_runs_mask(protocol: Protocol, runs: RunsTable) -> np.ndarray:
    """Runs whose every limited response was measured and met its limit."""
    return ~runs.pending & meets_limits(limit_rules(protocol), runs.Y, len(runs.pending))


def _incumbent(protocol: Protocol, runs: RunsTable, safe, model=None, U_runs=None) -> tuple[dict | None, str, list[str]]:
    """The best measured objective among runs that met every limit, the mode, and a message
    (a binomial objective's: :func:`.rates.rate_incumbent`)."""
    if protocol.objective.kind == "binomial":
        return rate_incumbent(protocol, runs, safe, model, U_runs)
    y_obj = runs.Y[protocol.objective.name]
    cand = safe & np.isfinite(y_obj)
    if not np.any(cand):
        return None, Mode.FEASIBILITY_FIRST, [
            "no run so far meets every limit: ranking by the joint figure to find a safe, "
            "feasible region first (feasibility first)"]
    idx = np.flatnonzero(cand)
    best = idx[np.argmax(y_obj[idx])] if protocol.maximize else idx[np.argmin(y_obj[idx])]
    return {"run_id": runs.run_ids[best], "value": float(y_obj[best])}, Mode.IMPROVE, []


def _scorer(protocol: Protocol, mode: str, rank_kw: dict, weigh_by_joint: bool = False):
    """``scores_of(mu, sd, result, incumbent)``: the rule's values, or the joint figure (feasibility first).

    With ``weigh_by_joint`` the rule's log value plus the log of the joint
    figure (for ``ei``: EI times the probability of meeting every limit, the
    textbook constrained rule; :func:`weighted_by_joint`).
    """
    def scores_of(mu, sd, result, inc_value):
        if mode == Mode.FEASIBILITY_FIRST:
            return result.joint.astype(float)
        score = rule_score(protocol.ranking.rule, mu, sd, inc_value, **rank_kw)
        return weighted_by_joint(score, result.joint) if weigh_by_joint else score
    return scores_of


def _screened(ctx: StepContext, X, scores_of, inc_value) -> Pool:
    U, mu, sd, lims = ctx.predict(X)
    result = ctx.screen(X, U, lims)
    return Pool(X, U, mu, sd, result, scores_of(mu, sd, result, inc_value))


def _search_effort(protocol: Protocol, pool_size: int | None, count: int,
                   n_runs: int) -> tuple[int, int, list[str]]:
    """Candidates to draw and survivors to refine: per proposed run (``batch.search_per_run``) or per step.

    Per run, the search grows with the batch only while the candidates times the measured
    runs stay within SEARCH_BUDGET (each candidate is predicted from every run), so a step on
    a large data set costs what one search per step would.
    """
    pool = protocol.batch.pool if pool_size is None else int(pool_size)
    refine_n = protocol.batch.refine
    if not protocol.batch.search_per_run or count <= 1:
        return pool, refine_n, []
    times = max(1, min(count, SEARCH_BUDGET // max(pool * max(n_runs, 1), 1)))
    total = min(pool * times, MAX_POOL)
    if times == 1:
        return pool, refine_n, [f"the search drew {pool} candidates for the whole batch, not {pool} for each of "
                                f"the {count} runs: with {n_runs} runs that would pass the search budget "
                                "(batch.search_per_run)"]
    text = (f"the search drew {total} candidates and refined up to {refine_n * times} survivors: {pool} and "
            f"{refine_n}" if refine_n else f"the search drew {total} candidates: {pool}")
    share = f"for each of the {count} runs asked for" if times == count else f"{times} times over for the {count} runs"
    return total, refine_n * times, [f"{text} {share} (batch.search_per_run)"]


def _refine_phase(ctx, pool: Pool, origin, mode, scores_of, inc_value, rank_kw, refine_n: int):
    """Refine the best ``refine_n`` survivors locally; when none passed, search from the
    candidates that failed only on probability for the highest product of the limits'
    probabilities (``refine.rescue_figure``; the screen is not relaxed: every point found is
    screened again in full, with its own joint figure)."""
    rescue = refine_n > 0 and not np.any(pool.result.survives)
    if refine_n <= 0 or not (np.any(pool.result.survives) or rescue):
        return pool, origin, []
    result = pool.result
    if rescue:
        near = np.flatnonzero(np.isin(result.reason, ("limit-probability", "joint-below-threshold", "rests-on-one-run")))
        starts = near[np.lexsort((near, -rescue_figure(result.P[near])))][:RESCUE_STARTS]
    else:
        survivors = np.flatnonzero(result.survives)
        starts = survivors[np.lexsort((survivors, -pool.scores[survivors]))][:refine_n]
    refined = refine(ctx, pool.X, starts, inc_value, Mode.FEASIBILITY_FIRST if rescue else mode, rank_kw,
                     rescue=rescue)
    if refined.shape[0]:
        origin = np.concatenate([origin, np.array(["refined"] * refined.shape[0], dtype=object)])
        pool = _screened(ctx, np.vstack([pool.X, refined]), scores_of, inc_value)
    messages = []
    if rescue:
        messages.append(f"no pool candidate passed the screen; a local search for the highest probabilities "
                        f"of meeting the limits, from the {len(starts)} closest candidates, found "
                        f"{int(np.sum(pool.result.survives))} that pass")
    return pool, origin, messages


def _rounding_phase(ctx, pool: Pool, origin, scores_of, inc_value):
    """Every candidate rounded to the factors' resolutions and screened again (when any is stated):
    the batch then chooses among rounded candidates only, so one that fails once rounded is
    replaced by the best rounded candidate that passes."""
    from guardband.planner.space.rounding import rounding_of  # here: the space package loads cvxpy

    rnd = rounding_of(ctx.protocol)
    if not rnd.any:
        return pool, origin, []
    X = rnd.round(pool.X)
    moved = np.any(X != pool.X, axis=1)
    before = pool.result.survives
    # the grid points around each refined survivor's rounding are candidates too
    refined = np.flatnonzero(before & (origin == "refined"))
    near = [rnd.neighbours(pool.X[i])[1:] for i in refined]
    near = np.vstack(near) if near else np.zeros((0, X.shape[1]))
    rounded = _screened(ctx, np.vstack([X, near]), scores_of, inc_value)
    lost = before & ~rounded.result.survives[: X.shape[0]]
    origin = np.array([f"{o}, rounded" if m else str(o) for o, m in zip(origin, moved)]
                      + ["refined, rounded, grid neighbour"] * near.shape[0], dtype=object)
    return rounded, origin, [
        f"every candidate was rounded to its factors' resolution ({rnd.describe()}"
        + ("; a mixture's total restored by largest remainders" if rnd.mixture.any() else "")
        + f") and screened again: {int(moved.sum())} moved; "
        f"{int(lost.sum())} of the {int(before.sum())} that passed before rounding fail after it and "
        f"cannot be proposed; {near.shape[0]} grid neighbours of the refined candidates were added"]


def _proposals(pool: Pool, chosen, origin, values, why, scale=None) -> list[Proposal]:
    res = pool.result
    mean, sd, lo95, hi95 = objective_band(pool.mu, pool.sd, scale)  # a binomial objective's: its rate
    return [Proposal(rank=r, x=pool.X[i].copy(), origin=str(origin[i]), mean=float(mean[i]),
                     sd=float(sd[i]), lo95=float(lo95[i]), hi95=float(hi95[i]),
                     p={n: float(res.P[i, j]) for j, n in enumerate(res.limit_names)},
                     joint=float(res.joint[i]), values={key: _num(v[i]) for key, v in values.items()},
                     score=float(pool.scores[i]), given_earlier=why[r - 1][0], reason=why[r - 1][1])
            for r, i in enumerate(chosen, start=1)]


def _in_progress_messages(runs: RunsTable, in_progress) -> list[str]:
    n = int(np.sum(in_progress))
    if not n:
        return []
    ids = ", ".join(np.asarray(runs.run_ids, dtype=object)[in_progress][:10])
    return [f"{n} run(s) in progress ({ids}{', ...' if n > 10 else ''}) shaped the batch: every model was "
            "conditioned on them as on earlier picks (objective at its mean, limits towards the limit), "
            "no proposal lies within the batch separation of one, and they do not move the incumbent"]


def _space_of(protocol: Protocol):
    space = protocol.design_space()
    check = space.check()
    if check.empty:
        raise ProtocolError("the design space is empty; conflicting constraints: " + "; ".join(check.conflicts))
    point = check.single_point(space.names)
    if point:
        raise ProtocolError(point)
    return space


def _grow_span(ctx: StepContext, U_measured, met) -> list[str]:
    """Double the tested span's push for each of the latest runs in a row that extended the span and
    met every limit (up to ``screen.span_growth``); the step's rules change, and the plan says so."""
    reach, growth = ctx.rules.span_reach, ctx.protocol.screen.span_growth
    if reach is None or growth <= 0:
        return []
    k = min(span_streak(U_measured, met, ctx.continuous_columns()), growth)
    if k == 0:
        return []
    ctx.rules = dataclasses.replace(ctx.rules, span_reach=reach * 2.0**k)
    return [f"the tested span is pushed out by {reach * 2.0**k:g} of its width (span_reach {reach:g} doubled "
            f"{k} time(s)): the latest {k} run(s) in a row that lay beyond it met every limit"]


def _least_worth_unused(protocol: Protocol, mode: str, forced: bool) -> list[str]:
    """Why ``batch.least_worth`` did not apply to this step, when it is set."""
    if protocol.batch.least_worth <= 0 or forced:
        return []
    if mode == Mode.FEASIBILITY_FIRST:
        why = "no run has met every limit yet (picks are ranked by the joint figure)"
    elif protocol.ranking.rule not in VALUED_RULES:
        why = f"the {protocol.ranking.rule} rule has no value that falls to nothing (only ei and pi do)"
    else:
        return []
    return [f"batch.least_worth {protocol.batch.least_worth:g} was not applied: {why}"]


@dataclass(frozen=True)
class PreparedStep:
    """What a step knows before it looks at any candidate: the models, the incumbent, the ranking."""

    ctx: StepContext
    safe: np.ndarray
    used: np.ndarray
    U_runs: np.ndarray
    incumbent: dict | None
    mode: str
    inc_value: float | None
    rank_kw: dict
    scores_of: object
    messages: list
    warm_start: dict
    children: list


def prepare_step(protocol: Protocol, runs: RunsTable, *, seed: int, warm_start: dict | None = None,
                 textbook: bool = False) -> PreparedStep:
    """Fit the models and find the incumbent, as a planning step does (phases 1, 2 and 5).

    :func:`plan_step` and :func:`guardband.planner.step.judge.judge_points`
    both start here, so a recipe judged with the same seed and warm start
    meets the very models of the plan.
    """
    space = _space_of(protocol)
    warm_start = dict(warm_start or {})
    children = np.random.SeedSequence(seed).spawn(2 + len(protocol.response_names))
    scaler, rules = Scaler(space), ScreenRules.from_protocol(protocol)
    used, U_runs = ~runs.pending, scaler.unit(runs.X)
    models = fit_models(protocol, rules, runs, U_runs, used, warm_start=warm_start, children=children,
                        n_free=int(scaler.free.sum()), textbook=textbook)
    safe = safe_runs_mask(protocol, runs)
    incumbent, mode, inc_messages = _incumbent(protocol, runs, safe, models.objective, U_runs)
    anchors, basis = (U_runs[safe], "run that met every limit") if np.any(safe) else (
        U_runs[used], "measured run (none has met every limit yet)")
    ctx = StepContext(protocol, space, scaler, rules, models, anchors, basis, weigh_by_joint=textbook)
    inc_messages = inc_messages + _grow_span(ctx, U_runs[used], safe[used])
    rank_kw = dict(maximize=protocol.maximize, kappa=protocol.ranking.kappa, xi=protocol.ranking.xi,
                   **objective_scale(protocol))
    return PreparedStep(ctx=ctx, safe=safe, used=used, U_runs=U_runs, incumbent=incumbent, mode=mode,
                        inc_value=incumbent.get("latent", incumbent["value"]) if incumbent else None, rank_kw=rank_kw,
                        scores_of=_scorer(protocol, mode, rank_kw, textbook),
                        messages=models.warnings() + stated_sd_contradicted(protocol, runs, U_runs) + inc_messages,
                        warm_start=warm_start, children=children)


def plan_step(
    protocol: Protocol,
    runs: RunsTable,
    *,
    seed: int,
    count: int | None = None,
    warm_start: dict | None = None,
    pool_size: int | None = None,
    explain: bool = True,
    textbook: bool = False,
) -> PlanResult:
    """Run one planning step.

    Parameters
    ----------
    protocol : Protocol
    runs : RunsTable
        Checked runs. A run with nothing measured yet is *in progress*: not
        data, but the batch treats it as already chosen (every model is
        conditioned on its fantasised results and no proposal lies within the
        batch separation of it; :mod:`.batch`); it never becomes the
        incumbent. A partly measured run is data for the responses present.
        The step rule measures from the runs that met every limit (or, when
        there is none yet, from the measured runs, and says so).
    seed : int
        Seeds the pool and the model restarts.
    count : int, optional
        Batch size; defaults to the protocol's. Given, the batch is filled
        as far as the screen allows (``batch.least_worth`` does not stop it).
    warm_start : dict, optional
        Hyperparameters by response name (from the last plan) tried first.
    pool_size : int, optional
        Overrides the protocol's pool size (per proposed run, as the
        protocol's, under ``batch.search_per_run``).
    explain : bool
        Also find what each ranking rule would propose and what each
        threshold costs (:mod:`.attitudes`); the simulator turns it off.
    textbook : bool
        The textbook constrained rule, for the simulator's ``textbook``
        strategy (whose protocol also switches the screen off): rank by the
        rule's value times the joint figure, and fit the Gaussian limit
        models with their prior mean at the data's mean and no
        signal-variance floor. Never set by a protocol.

    Returns
    -------
    PlanResult
        With zero proposals when no candidate passed the screen (the caller
        decides what that means for the exit code).

    Raises
    ------
    ProtocolError
        When the design space is empty.
    ModelError
        When the objective model cannot be fitted or has too few runs.
    """
    forced = count is not None
    count = protocol.batch.size if count is None else int(count)
    pool_size, refine_n, effort = _search_effort(protocol, pool_size, count, int((~runs.pending).sum()))
    st = prepare_step(protocol, runs, seed=seed, warm_start=warm_start, textbook=textbook)
    ctx, scores_of, inc_value, rank_kw = st.ctx, st.scores_of, st.inc_value, st.rank_kw
    space, models, used, U_runs, messages = st.ctx.space, st.ctx.models, st.used, st.U_runs, list(st.messages)
    X_pool, origin = candidate_pool(space, runs.X[st.safe], pool_size, np.random.default_rng(st.children[0]))
    pool = _screened(ctx, X_pool, scores_of, inc_value)
    pool, origin, more = _refine_phase(ctx, pool, origin, st.mode, scores_of, inc_value, rank_kw, refine_n)
    messages += effort + more
    pool, origin, more = _rounding_phase(ctx, pool, origin, scores_of, inc_value)
    messages += more

    in_progress = runs.pending  # factors set, nothing measured yet: already chosen
    picks = rule_picks(ctx, pool, origin, inc_value, rank_kw, U_busy=U_runs[in_progress]) if explain else []
    price = threshold_price(ctx, pool, inc_value, rank_kw) if explain else []
    batch_rule = BatchRule.of(protocol, rank_kw, rng=np.random.default_rng(st.children[1]), forced=forced,
                              weigh_by_joint=textbook)
    chosen, more, given = greedy_batch(ctx, pool, count, scores_of, inc_value, protocol.maximize,
                                       U_busy=U_runs[in_progress], rule=batch_rule)
    more += _least_worth_unused(protocol, st.mode, forced)
    why = pick_explanations(given, st.mode, protocol.ranking.rule, rank_kw)
    messages += more + _in_progress_messages(runs, in_progress)
    esc = protocol.escalation
    if esc is not None and esc.cohort_size is not None:
        messages.append(f"each proposal is one cohort of {esc.cohort_size} subjects (escalation.cohort_size)")
    # all four values from the models fitted to real data (EI and PI are NaN,
    # shown empty, when there is no incumbent yet)
    values = all_values(pool.mu, pool.sd, inc_value, **rank_kw)
    if not chosen:
        messages += closest_miss(pool, [lim.probability for lim in ctx.rules.limits], ctx.rules.threshold)
    if chosen and st.incumbent is not None and st.mode == Mode.IMPROVE:
        best = runs.run_ids.index(st.incumbent["run_id"])
        messages += unlikely_to_improve(pool, chosen[0], float(values["pi"][chosen[0]]), U_runs[best],
                                        f"{st.incumbent['run_id']} ({st.incumbent['value']:.4g})")
    return PlanResult(
        protocol=protocol, factor_names=protocol.factor_names, seed=int(seed), mode=st.mode,
        incumbent=st.incumbent, proposals=_proposals(pool, chosen, origin, values, why, rank_kw.get("scale")), pool=pool.X, origin=origin,
        screen=pool.result, scores=np.asarray(pool.scores, dtype=float), models=models.summaries,
        messages=list(pool.result.messages) + messages, warm_start=st.warm_start, runs_sha256=runs.sha256,
        n_runs_used=int(used.sum()), n_in_progress=int(in_progress.sum()), flags=runs.flags,
        fitted={protocol.objective.name: models.objective,
                **{lim.name: lm for lim, lm in zip(protocol.limits, models.limits)}},
        space=space, rule_picks=picks, threshold_price=price,
    )
