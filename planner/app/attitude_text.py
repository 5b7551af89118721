"""The rule comparison and the price of a threshold, as tables and sentences for people.

The figures come from :mod:`guardband.planner.step.attitudes` (kept in the
step's result and its log record); this module only words them.
"""

from __future__ import annotations

from guardband.planner.step.attitudes import rule_guidance
from guardband.planner.step.result import PlanResult

__all__ = ["comparison_rows", "price_rows", "price_sentence", "guidance_lines", "COMPARISON_HEADER",
           "PRICE_HEADER"]

COMPARISON_HEADER = ["rule", "pick", "predicted", "95% interval", "P(better)", "EI", "P(worse)",
                     "5%..95%", "joint"]
PRICE_HEADER = ["threshold", "candidates passing", "best predicted", "vs own"]


def _g(v, digits: int = 4) -> str:
    return "-" if v is None else f"{v:.{digits}g}"


def comparison_rows(result: PlanResult) -> list[list[str]]:
    """One row per rule: its first pick's figures for the next measured result.

    ``pick`` says whether the pick is the plan's first proposal, the same
    point as another rule's, or why there is none.
    """
    first = result.proposals[0].x if result.proposals else None
    rows = []
    for e in result.rule_picks:
        if e["candidate"] is None:
            rows.append([e["rule"], e.get("note", "none")] + ["-"] * (len(COMPARISON_HEADER) - 2))
            continue
        o = e["outcome"]
        x = [e["x"][n] for n in result.factor_names]
        where = "proposal 1" if first is not None and list(first) == x else e["origin"]
        if e["same_as"]:
            where += " (= " + ", ".join(e["same_as"]) + ")"
        rows.append([e["rule"], where, _g(o["mean"]), f"{_g(o['lo95'])} to {_g(o['hi95'])}",
                     _g(o["p_better"], 3), _g(o["ei"], 3), _g(o["p_worse"], 3),
                     f"{_g(o['q05'])}..{_g(o['q95'])}", f"{e['joint']:.3f}"])
    return rows


def price_rows(result: PlanResult) -> list[list[str]]:
    """One row per threshold: candidates passing, the best predicted objective, its change
    from the protocol's own threshold (in the objective's units, positive is better)."""
    own = next((e for e in result.threshold_price if e["own"]), None)
    sign = 1.0 if result.protocol.maximize else -1.0
    rows = []
    for e in result.threshold_price:
        change = "-"
        if own is not None and own["best_mean"] is not None and e["best_mean"] is not None:
            delta = sign * (e["best_mean"] - own["best_mean"])
            change = "own" if e["own"] else ("same" if abs(delta) < 1e-9 else f"{delta:+.3g}")
        rows.append([f"{e['threshold']:g}" + (" (own)" if e["own"] else ""),
                     f"{e['n_pass']:,} of {e['n_candidates']:,}", _g(e["best_mean"]), change])
    return rows


def price_sentence(result: PlanResult) -> str:
    """What moving from the protocol's threshold to the next one up costs, in words."""
    price = result.threshold_price
    own = next((k for k, e in enumerate(price) if e["own"]), None)
    if own is None or own + 1 >= len(price):
        return ""
    a, b = price[own], price[own + 1]
    obj = result.protocol.objective
    unit = f" ({obj.unit})" if obj.unit else ""
    if a["best_mean"] is None:
        return f"no candidate passes at the protocol's threshold {a['threshold']:g}"
    if b["best_mean"] is None:
        return (f"raising the threshold from {a['threshold']:g} to {b['threshold']:g} leaves no candidate "
                "that passes")
    sign = 1.0 if result.protocol.maximize else -1.0
    cost = sign * (a["best_mean"] - b["best_mean"])
    # the same best candidate at both thresholds: nothing (not "-0" or a rounding error's -1e-17)
    same = abs(cost) <= 1e-9 * max(1.0, abs(a["best_mean"]))
    what = "costs nothing in" if same else f"costs about {cost:.3g}{unit} in"
    return (f"raising the threshold from {a['threshold']:g} to {b['threshold']:g} {what} "
            f"the best predicted {obj.name}, and leaves {b['n_pass']:,} of "
            f"{b['n_candidates']:,} candidates passing")


def guidance_lines(result: PlanResult) -> list[str]:
    """The protocol rule's attitude and which other rule's pick differs most, in words."""
    return rule_guidance(result.protocol, result.rule_picks, mode=result.mode)
