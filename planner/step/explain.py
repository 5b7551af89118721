"""Why each pick of a batch: its value given the picks before it, and one line of reason.

The batch (:mod:`.batch`) chooses pick k on the models conditioned
on the fantasised results of the runs in progress and of picks 1..k-1. The
four rule values here are computed on those conditioned models (with the
incumbent as the fantasies left it; under the sampled method, averaged over
the draws of those results), so they are the values the pick was actually
chosen on; the plan table's own columns stay the values under the
models fitted to real data.
"""

from __future__ import annotations

import numpy as np

from guardband.planner.step.acquisition import all_values
from guardband.planner.step.batch import SAMPLES
from guardband.planner.step.result import Mode, _num

__all__ = ["pick_explanations", "LITTLE_WORTH"]

#: A pick whose EI (or PI) given the earlier picks is below this share of the
#: first pick's is flagged as worth little.
LITTLE_WORTH = 0.01


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
