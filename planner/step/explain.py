"""Why each pick of a batch: its value given the picks before it, and one line of reason; and why
none is likely to beat the best run, when that is so.

The batch (:mod:`.batch`) chooses pick k on the models conditioned
on the fantasised results of the runs in progress and of picks 1..k-1. The
four rule values here are computed on those conditioned models (with the
incumbent as the fantasies left it; under the sampled method, averaged over
the draws of those results), so they are the values the pick was actually
chosen on; the plan table's own columns stay the values under the
models fitted to real data.
"""

from __future__ import annotations

from collections import Counter

import numpy as np

from guardband.planner.step.acquisition import all_values
from guardband.planner.step.batch import SAMPLES
from guardband.planner.step.result import Mode, _num
from guardband.safety.screen import REASON_TEXT

__all__ = ["pick_explanations", "unlikely_to_improve", "closest_miss", "LITTLE_WORTH", "UNLIKELY", "NEAREST"]

#: A pick whose EI (or PI) given the earlier picks is below this share of the
#: first pick's is flagged as worth little.
LITTLE_WORTH = 0.01
#: A first pick whose chance of beating the best run is below this draws a note saying why.
UNLIKELY = 0.01
#: The note counts the screen's verdicts on this many candidates nearest the best run.
NEAREST = 50


def _given_values(g: dict, rank_kw: dict) -> dict:
    if "values" in g:  # the sampled method: averaged over the draws of the earlier results
        return {k: _num(v) for k, v in g["values"].items()}
    v = all_values(np.array([g["mean"]]), np.array([g["sd"]]), g["incumbent"], **rank_kw)
    return {k: _num(a[0]) for k, a in v.items()}


def _conditioned_on(g: dict) -> str:
    parts = []
    if g["earlier"]:
        parts.append(f"{g['earlier']} earlier pick(s)")
    if g["in_progress"]:
        parts.append(f"{g['in_progress']} run(s) in progress")
    return " and ".join(parts)


def _reason(g: dict, values: dict, first: dict | None, mode: str, rule: str) -> str:
    pool = f"the best of {g['eligible']} candidate(s) that pass the screen"
    if g.get("region") is not None:  # the explore method's later picks
        pool = (f"the largest objective sd ({g['sd']:.3g}; chosen to learn, not for its {rule}) among "
                f"{g['region']} candidate(s) that pass the screen and could still be the best")
    if mode == Mode.FEASIBILITY_FIRST:
        head = f"joint figure {g['joint']:.4g}"
    else:
        head = f"{rule} {_fmt(values.get(rule))}"
    given = _conditioned_on(g)
    if not given:
        return f"{head} on the models fitted to the runs: {pool}"
    near = "an earlier pick" + (" or a run in progress" if g["in_progress"] else "")
    how = (f"averaged over {SAMPLES} sampled results of {given}" if g.get("sampled")
           else f"given the fantasised results of {given}")
    text = f"{head} {how}: {pool} under those fantasies, none within the batch separation of {near}"
    if first is not None and mode != Mode.FEASIBILITY_FIRST:
        a, b = values.get(rule), first.get(rule)
        if rule in ("ei", "pi") and a is not None and b:
            text += f" (worth {a / b:.2g} of the first pick's {rule})"
            if a / b < LITTLE_WORTH and g.get("region") is None:
                text += ("; little is expected from it, and a smaller batch (--count, or batch.least_worth "
                         "to stop there) may serve as well")
    return text


def _fmt(v) -> str:
    return "n/a" if v is None else f"{v:.3g}"


def pick_explanations(given: list[dict], mode: str, rule: str, rank_kw: dict) -> list[tuple[dict, str]]:
    """(the four rule values given the earlier picks, a one-line reason), per pick."""
    out, first = [], None
    for g in given:
        values = _given_values(g, rank_kw)
        out.append((values, _reason(g, values, first, mode, rule)))
        if first is None:
            first = values
    return out


def unlikely_to_improve(pool, first: int, pi_first, U_best: np.ndarray, best: str) -> list[str]:
    """A note when the first pick is unlikely to beat the best run: what the screen said near that run.

    ``pool``: the screened candidates (``U`` unit-scaled, ``result`` the
    screen's); ``first``: the first pick's index there and ``pi_first`` its
    chance of a better result; ``U_best``: the best run, unit-scaled, named
    ``best``. Empty unless ``pi_first`` is below :data:`UNLIKELY`. The
    :data:`NEAREST` candidates nearest the best run are counted by the
    screen's verdict, and for those short of a limit's probability, by the
    limit that fell lowest.
    """
    if pi_first is None or not np.isfinite(pi_first) or pi_first >= UNLIKELY:
        return []
    res = pool.result
    near = np.argsort(np.linalg.norm(pool.U - U_best, axis=1), kind="stable")[:NEAREST]
    parts = [f"{int(np.sum(res.survives[near]))} pass"]
    for reason, n in Counter(str(r) for r in res.reason[near] if r).most_common(3):
        text = f"{n} {reason} ({REASON_TEXT.get(reason, reason)}"
        if reason == "limit-probability" and len(res.limit_names) > 1:
            P = np.asarray(res.P, dtype=float)[near[res.reason[near] == reason]]
            P = P[np.all(np.isfinite(P), axis=1)]
            if P.shape[0]:
                name, k = Counter(res.limit_names[j] for j in np.argmin(P, axis=1)).most_common(1)[0]
                text += f"; {name} the lowest in {k}"
        parts.append(text + ")")
    return [f"no candidate that passes the screen is likely to beat the best run {best}: the first pick's "
            f"chance of a better result is {pi_first:.2g}. Of the {near.size} candidates nearest that run, "
            + ", ".join(parts) + ". The price of the threshold shows what a lower threshold would admit; "
            "the protocol's author decides"]


def closest_miss(pool, requirements, threshold: float) -> list[str]:
    """A note when nothing passes the screen: the candidate that came nearest, and what held it back.

    ``requirements``: each limit's required probability, in the order of the
    screen's limits; ``threshold``: the joint figure's. The nearest is the
    candidate inside the design space with the highest joint figure; the
    limit named is the one furthest below its requirement there.
    """
    res = pool.result
    joint = np.nan_to_num(np.asarray(res.joint, dtype=float), nan=-1.0)
    inside = np.asarray(res.reason) != "outside-design-space"
    if not np.any(inside) or not len(res.limit_names):
        return []
    i = int(np.flatnonzero(inside)[np.argmax(joint[inside])])
    P = np.nan_to_num(np.asarray(res.P, dtype=float)[i], nan=0.0)
    short = P - np.asarray(requirements, dtype=float)
    j = int(np.argmin(short))
    return [f"the nearest miss: candidate {i} ({res.reason[i]}) with a joint figure of {joint[i]:.3g} against "
            f"{threshold:g}; there {res.limit_names[j]!r} is met with probability {P[j]:.3g} against the "
            f"{requirements[j]:g} required. The exclusion table gives every candidate's reason; "
            "`guardband judge` gives the models' figures for recipes of your own"]
