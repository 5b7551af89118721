"""The four ranking rules as attitudes to risk: what each would propose, and what a threshold costs.

Write y* for the incumbent (the best measured objective among runs that met
every limit) and Y for the result the next run will measure, predicted as
``N(mean, sd_f^2 + noise)`` by the objective's model. The rules differ in how
they weigh a worse result:

* ``mean``: E[Y]. A worse result counts against the run in proportion to how
  much worse: the figure that fits when the next run replaces y* for good.
* ``ei``: E[max(Y - y*, 0)] (maximising). A worse result counts as no gain:
  fits when y* stays available whatever happens, so a worse run costs only
  itself. By Jensen's inequality it is never below max(E[Y] - y*, 0).
* ``pi``: P(Y > y*). Any gain counts alike, so a likely small gain beats an
  unlikely large one: the most cautious rule.
* ``bound``: the optimistic end mean + kappa sd. A long shot: the largest gain
  that is still plausible.

These are rules of thumb of the trade; whichever rule ranks, the safety
screen, not the rule, keeps each run within the limits.

:func:`rule_picks` finds the first pick of every rule among the candidates
that passed the screen (whatever the protocol's rule) with the figures that
show the attitude (:func:`outcome_figures`). :func:`threshold_price` gives,
for several thresholds, the best predicted objective among candidates that
pass there and how many pass, judged by the same screen function as the
plan, with a local refinement at each threshold.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from guardband.planner.settings import Z95
from guardband.planner.step.result import Mode

__all__ = ["RULE_ORDER", "ATTITUDES", "PRICE_THRESHOLDS", "outcome_figures", "rule_picks",
           "threshold_price", "rule_guidance", "threshold_binding"]

#: The rules in the order they are shown, most cautious last.
RULE_ORDER = ("mean", "ei", "pi", "bound")
#: Each rule's attitude in plain words (what a worse run costs when it fits).
ATTITUDES = {
    "mean": ("expected result: fits when the next run replaces the best so far for good, so a worse "
             "result is a loss in proportion to how much worse"),
    "ei": ("expected gain over the best so far, a worse result counting as no gain: fits when the best "
           "so far stays available whatever happens, so a worse run costs only its own materials and time"),
    "pi": ("chance of any gain over the best so far: the most cautious rule, preferring a likely small "
           "gain to an unlikely large one; fits studies where a worse result is not acceptable"),
    "bound": ("optimistic end of the predicted interval: a long shot, the largest gain that is still "
              "plausible at a small chance; fits when a worse run costs little and exploring pays"),
}
#: Thresholds at which the price of the screen is shown (and the protocol's own).
PRICE_THRESHOLDS = (0.5, 0.8, 0.9, 0.95, 0.99)


def outcome_figures(mean, sd, incumbent, *, maximize: bool) -> dict[str, np.ndarray]:
    """What the next measured result Y ~ N(mean, sd^2) looks like against the incumbent.

    Returns arrays: ``mean``, ``lo95``/``hi95`` (central 95% interval),
    ``q05``/``q95`` (5% and 95% quantiles), and with an incumbent
    ``p_better`` = P(Y better than y*), ``p_worse`` = P(Y worse than y*),
    ``ei`` = E[gain over y*] and ``shortfall`` = E[loss below y*] (NaN
    without an incumbent).
    """
    from scipy.special import ndtr, ndtri  # here: the words of this module need no scipy

    from guardband.planner.step.acquisition import expected_improvement

    mean = np.asarray(mean, dtype=float)
    sd = np.asarray(sd, dtype=float)
    # the normal's quantiles and tail from scipy.special (scipy.stats is slow to import and the
    # planning step must not load it; its norm.ppf and norm.sf are these same functions)
    out = {"mean": mean, "sd": sd, "lo95": mean - Z95 * sd, "hi95": mean + Z95 * sd,
           "q05": mean + sd * ndtri(0.05), "q95": mean + sd * ndtri(0.95)}
    if incumbent is None:
        nan = np.full(mean.shape, np.nan)
        return {**out, "p_better": nan, "p_worse": nan, "ei": nan, "shortfall": nan}
    above = ndtr((mean - incumbent) / sd)
    out["p_better"] = above if maximize else 1.0 - above
    out["p_worse"] = 1.0 - out["p_better"]
    out["ei"] = expected_improvement(mean, sd, incumbent, maximize=maximize)
    # E[max(y* - Y, 0)] when maximising is the EI of the opposite direction
    out["shortfall"] = expected_improvement(mean, sd, incumbent, maximize=not maximize)
    return out


def rule_picks(ctx, pool, origin, inc_value, rank_kw: dict, U_busy=None) -> list[dict]:
    """The first pick of each rule among the pool's survivors, with its attitude figures.

    A rule that needs an incumbent has no pick before a run meets every
    limit (``candidate`` None, ``note`` says why); so has every rule when
    nothing passed the screen. Survivors within the batch separation of a
    run in progress (``U_busy``, unit-scaled) are not picks: that run is
    already being made.
    """
    from guardband.planner.step.acquisition import score as rule_score
    from guardband.planner.step.batch import MIN_SEPARATION
    from guardband.safety.screen import step_distance

    protocol = ctx.protocol
    survivors = np.flatnonzero(pool.result.survives)
    if U_busy is not None and len(U_busy) and survivors.size:
        survivors = survivors[step_distance(pool.U[survivors], np.asarray(U_busy, dtype=float)) >= MIN_SEPARATION]
    out = []
    for rule in RULE_ORDER:
        entry = {"rule": rule, "attitude": ATTITUDES[rule], "candidate": None, "same_as": []}
        if rule in ("ei", "pi") and inc_value is None:
            entry["note"] = "needs a best run that met every limit; there is none yet"
        elif survivors.size == 0:
            entry["note"] = "no candidate passed the screen"
        else:
            s = rule_score(rule, pool.mu[survivors], pool.sd[survivors], inc_value, **rank_kw)
            i = int(survivors[np.lexsort((survivors, -s))[0]])
            entry.update(_pick_figures(ctx, pool, origin, i, inc_value, protocol.maximize))
        out.append(entry)
    _distances(out, pool.U, protocol.ranking.rule)
    return out


def _distances(picks: list[dict], U, own_rule: str) -> None:
    """Each pick's unit-scaled distance (per sqrt(free factor)) from the protocol rule's pick,
    and the rules whose picks lie within MIN_SEPARATION of it (the same run, in effect)."""
    from guardband.planner.step.batch import MIN_SEPARATION

    scale = np.sqrt(max(U.shape[1], 1))
    d = lambda a, b: float(np.linalg.norm(U[a["candidate"]] - U[b["candidate"]]) / scale)
    own = next((e for e in picks if e["rule"] == own_rule and e["candidate"] is not None), None)
    for e in picks:
        if e["candidate"] is None:
            continue
        e["distance"] = d(e, own) if own is not None else None
        e["same_as"] = [o["rule"] for o in picks
                        if o is not e and o["candidate"] is not None and d(e, o) < MIN_SEPARATION]


def _pick_figures(ctx, pool, origin, i: int, inc_value, maximize: bool) -> dict:
    """One candidate's factors, screen figures and outcome figures (next measurement)."""
    if ctx.protocol.objective.kind == "binomial":  # the true rate, from the latent logit (no measurement noise)
        from guardband.planner.step.rates import rate_outcome_figures

        figs = rate_outcome_figures(pool.mu[i:i + 1], pool.sd[i:i + 1], inc_value, maximize=maximize)
    else:
        mean, sd = ctx.models.objective.predict(pool.U[i:i + 1], include_noise=True)
        figs = outcome_figures(mean, sd, inc_value, maximize=maximize)
    res = pool.result
    return {
        "candidate": i,
        "x": {n: float(v) for n, v in zip(ctx.protocol.factor_names, pool.X[i])},
        "origin": str(origin[i]),
        "outcome": {k: _num(v[0]) for k, v in figs.items()},
        "p": {n: float(res.P[i, j]) for j, n in enumerate(res.limit_names)},
        "joint": float(res.joint[i]),
    }


def threshold_price(ctx, pool, inc_value, rank_kw: dict, *, refine_starts: int = 1) -> list[dict]:
    """For each threshold of PRICE_THRESHOLDS and the protocol's own: how many pool
    candidates pass, and the best predicted objective (mean) among every point that passes.

    At each threshold the best passing pool candidates are refined locally
    for the predicted mean, with the screen at that threshold as the
    constraint. Every point found at any threshold is screened at every
    threshold, so each figure is the best over all points passing there:
    raising the threshold can never raise it, and the point behind each
    figure passes the screen at that threshold. When the protocol states
    resolutions, each refined point is replaced by the grid points around it
    (:meth:`Rounding.neighbours`), so that every figure is a recipe the lab
    can weigh, as every proposal is.
    """
    from guardband.planner.space.rounding import rounding_of  # here: the space package loads cvxpy
    from guardband.planner.step.rates import objective_band
    from guardband.planner.step.refine import refine

    rnd = rounding_of(ctx.protocol)
    own = float(ctx.protocol.screen.threshold)
    thresholds = sorted({*PRICE_THRESHOLDS, own})
    preds = ctx.limit_predictions(pool.U)
    kw = {**rank_kw}
    found = [pool.X]
    for t in thresholds:
        ctx_t = replace(ctx, rules=replace(ctx.rules, threshold=t))
        res = ctx_t.screen(pool.X, pool.U, preds)
        idx = np.flatnonzero(res.survives)
        if idx.size and refine_starts > 0:
            best = idx[np.lexsort((idx, -_signed(pool.mu[idx], ctx.protocol.maximize)))][:refine_starts]
            X_t = refine(ctx_t, pool.X, best, inc_value, Mode.IMPROVE, kw, rule="mean")
            # with resolutions, as the plan's candidates: the grid points around each refined point
            found.append(np.vstack([rnd.neighbours(x) for x in X_t]) if rnd.any and X_t.shape[0] else X_t)
    X_all = np.vstack(found)
    U_all, mu_all, sd_all, preds_all = ctx.predict(X_all)
    shown = objective_band(mu_all, sd_all, rank_kw.get("scale"))[0]  # a binomial objective: the mean rate
    n_pool = pool.X.shape[0]
    out = []
    for t in thresholds:
        ctx_t = replace(ctx, rules=replace(ctx.rules, threshold=t))
        passes = ctx_t.screen(X_all, U_all, preds_all).survives
        entry = {"threshold": t, "own": t == own, "n_pass": int(passes[:n_pool].sum()), "n_candidates": n_pool,
                 "best_mean": None, "x": None}
        if np.any(passes):
            idx = np.flatnonzero(passes)
            j = int(idx[np.lexsort((idx, -_signed(shown[idx], ctx.protocol.maximize)))][0])
            entry.update(best_mean=float(shown[j]),
                         x={n: float(v) for n, v in zip(ctx.protocol.factor_names, X_all[j])})
        out.append(entry)
    return out


def rule_guidance(protocol, picks: list[dict] | None = None, *, mode: str = Mode.IMPROVE) -> list[str]:
    """Plain-words lines: the attitude of the protocol's rule, what suits a dose study, and
    (given the step's picks) which other rule's pick differs most from the protocol rule's, and how."""
    rule = protocol.ranking.rule
    lines = [f"the protocol ranks by {rule!r}, the {ATTITUDES[rule]}"]
    if protocol.study.kind == "dose":
        lines.append("a dose study: a worse run can harm a subject, so the cautious rules ('pi', 'mean') "
                     "suit it; whichever rule ranks, the safety screen, not the rule, keeps each run "
                     "within the limits")
    if picks and mode == Mode.IMPROVE:
        line = _most_different(protocol, {e["rule"]: e for e in picks})
        if line:
            lines.append(line)
    return lines


def _most_different(protocol, picks: dict) -> str:
    """Which other rule's pick lies farthest from the protocol rule's, and what it bets on."""
    own = picks.get(protocol.ranking.rule)
    if own is None or own["candidate"] is None:
        return ""
    from guardband.planner.step.batch import MIN_SEPARATION

    others = [e for r, e in picks.items() if r != protocol.ranking.rule and e["candidate"] is not None]
    if not others:
        return ""
    dist = [e["distance"] for e in others]
    k = int(np.argmax(dist))
    other = others[k]
    if dist[k] < MIN_SEPARATION:
        return ("every rule picks the same run here (within the batch separation): the choice of rule "
                "does not change this step's first proposal")
    a, b = own["outcome"], other["outcome"]
    why = [f"predicted {_f(b['mean'])} (95% interval {_f(b['lo95'])} to {_f(b['hi95'])}) against "
           f"{_f(a['mean'])} ({_f(a['lo95'])} to {_f(a['hi95'])})"]
    if a.get("p_worse") is not None and b.get("p_worse") is not None:
        why.append(f"chance of a worse result than the best so far {b['p_worse']:.2f} against {a['p_worse']:.2f}")
    spread = "a wider gamble" if b["sd"] > a["sd"] * 1.1 else (
        "a narrower, safer bet" if b["sd"] < a["sd"] / 1.1 else "a similar spread")
    return (f"the {other['rule']!r} rule's pick differs most from the {protocol.ranking.rule!r} pick "
            f"(distance {dist[k]:.2f}, unit-scaled): {'; '.join(why)}; {spread}")


def threshold_binding(protocol) -> list[str]:
    """Warnings about a screen threshold that cannot bind, or that makes per-limit requirements redundant.

    Any candidate that passes every limit's own requirement p_i has a joint
    figure of at least 1 - sum(1 - p_i) (the bound; the product of the p_i
    when the protocol asks for independence), so a threshold at or below
    that never excludes anything. Both joint figures are at most each
    limit's own probability, so a threshold at or above a limit's own
    requirement makes that requirement redundant.
    """
    limits = protocol.limits
    t = float(protocol.screen.threshold)
    if not limits:
        return []
    probs = np.array([lim.probability for lim in limits], dtype=float)
    if protocol.screen.joint == "bound":
        implied, how = max(0.0, 1.0 - float(np.sum(1.0 - probs))), "1 - sum(1 - p_i)"
    else:
        implied, how = float(np.prod(probs)), "the product of the p_i"
    if len(limits) == 1:
        lim = limits[0]
        return [f"with one limit the joint figure is the probability of {lim.name!r}: the stricter of "
                f"screen.threshold ({t:g}) and its own probability ({lim.probability:g}) decides, "
                "the other never binds"] if t != lim.probability else []
    out = []
    if t <= implied + 1e-12:
        out.append(f"screen.threshold {t:g} never binds: the limits' own probabilities "
                   f"({', '.join(f'{p:g}' for p in probs)}) already imply a joint figure of at least "
                   f"{implied:.4g} ({how}); raise the threshold above {implied:.4g} or lower a limit's "
                   "probability if the threshold is meant to decide")
    redundant = [f"{lim.name} ({lim.probability:g})" for lim in limits if lim.probability <= t - 1e-12]
    if redundant and len(limits) > 1:
        out.append(f"screen.threshold {t:g} is above the own probability of {', '.join(redundant)}: a joint "
                   "figure that high already needs each limit's probability to reach it, so these "
                   "requirements never bind")
    return out


def _f(v) -> str:
    return "-" if v is None else f"{v:.4g}"


def _signed(mu, maximize: bool):
    return mu if maximize else -mu


def _num(v) -> float | None:
    v = float(v)
    return v if np.isfinite(v) else None
