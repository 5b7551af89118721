"""The plan as a person reads it in a terminal: the proposals in two narrow tables.

The CSV plan table keeps every column; the terminal shows the settings
(with units in the headers) and then what the models say, each table
split into blocks that fit :data:`~guardband.planner.app.textable.TERMINAL_WIDTH`
columns, with the run id repeated in every block.
"""

from __future__ import annotations

from guardband.planner.app.textable import render_table
from guardband.planner.step.rates import limit_rate_bands
from guardband.planner.step.result import PlanResult

__all__ = ["settings_table", "figures_table"]

def _run_id(step_label: str, rank: int) -> str:
    return f"{step_label}-{rank:02d}"


def settings_table(result: PlanResult, step_label: str) -> str:
    """Rank, run id and every factor's setting, units in the headers."""
    p = result.protocol
    header = ["rank", "run_id", *[f.name + (f" [{f.unit}]" if f.unit else "") for f in p.factors]]
    rows = [[q.rank, _run_id(step_label, q.rank), *[float(x) for x in q.x]] for q in result.proposals]
    return render_table(header, rows, keys=2)


def _band(band, k: int) -> str:
    """"0.0812 (0.0101 to 0.436)": a rate's median and 95% interval, or "-" without a model."""
    if band is None:
        return "-"
    median, lo, hi = (float(a[k]) for a in band)
    return f"{median:.3g} ({lo:.3g} to {hi:.3g})"


def figures_table(result: PlanResult, step_label: str) -> str:
    """What the models say about each proposal: the objective with its interval, each limit's
    probability (a binomial limit's predicted rate with its interval too), the joint figure, the
    value of the rule that ranked it, its origin."""
    p = result.protocol
    obj = p.objective
    unit = f" [{obj.unit}]" if obj.unit else ""
    rule = p.ranking.rule if result.mode == "improve" else None
    bands = limit_rate_bands(result)  # a binomial limit: its predicted true rate too
    header = ["run_id", f"{obj.name}{unit}", "95% interval",
              *[h for n in p.limit_names for h in ([f"P({n} ok)", f"{n} (95% interval)"] if n in bands
                                                     else [f"P({n} ok)"])], "joint"]
    if rule is not None and rule != "mean":  # the mean rule's value is the predicted value itself
        header.append(f"{rule} value")
    header.append("origin")
    rows = []
    for k, q in enumerate(result.proposals):
        row = [_run_id(step_label, q.rank), q.mean, f"{q.lo95:.4g} to {q.hi95:.4g}",
               *[c for n in p.limit_names for c in ([q.p[n], _band(bands[n], k)] if n in bands else [q.p[n]])],
               q.joint]
        if rule is not None and rule != "mean":
            row.append(q.values.get(rule))
        rows.append(row + [q.origin])
    return render_table(header, rows, keys=1)
