"""Checks on a runs table's units, and on its values once in the protocol's units.

A unit stated in a column header is converted to the protocol's, or
refused where that is not safe (see :mod:`planner.inputs.units`). A factor
value outside its bounds, or off a discrete factor's levels, and a run that
breaks a rule of the protocol's constraints, are kept and flagged; a run
whose components miss the mixture total is a problem. The
values of a column whose stated unit cannot be converted are not judged. A
binomial response's two count columns become its rate (and the counts).
"""

from __future__ import annotations

import numpy as np

from guardband.planner import settings
from guardband.planner.inputs.protocol import Protocol
from guardband.planner.inputs.units import UnitError, conversion

__all__ = ["check_unit", "to_protocol_units", "factor_value_flags", "mixture_total_problems",
           "binomial_counts", "rate_column_problem", "missing_column_problem"]


def _unconvertible(convert: dict[str, object], name: str) -> bool:
    """Whether the column ``name`` states a unit that cannot be converted."""
    return convert.get(name, True) is None


def check_unit(convert: dict[str, object], label: str, name: str, unit: str, protocol: Protocol,
               problems: list[str], flags: list[str]) -> None:
    """Note in ``convert`` how a column's stated unit converts to the protocol's, or why it cannot.

    Parameters
    ----------
    convert : dict of str to Conversion or None
        Filled in for ``name``: the conversion, or None where the unit cannot
        be converted (a problem is appended); left alone where no conversion
        is needed.
    label : str
        The column as messages name it: "column D (force)".
    name, unit : str
        A factor or response, and the unit its header states.
    problems, flags : list of str
        Appended to.
    """
    unit_of = {f.name: f.unit for f in protocol.factors}
    unit_of[protocol.objective.name] = protocol.objective.unit
    unit_of.update({lim.name: lim.unit for lim in protocol.limits})
    if unit == unit_of[name]:
        return
    try:
        conv = conversion(unit, unit_of[name])
    except UnitError as exc:
        problems.append(f"{label}: the header states unit [{unit}] but the protocol's unit is "
                        f"[{unit_of[name]}]; {exc}")
        convert[name] = None
        return
    if not conv.identity:
        convert[name] = conv
        flags.append(f"{label}: values converted {conv.describe()}")


def to_protocol_units(protocol: Protocol, X: np.ndarray, Y: dict[str, np.ndarray],
                      convert: dict[str, object], wheres: list[str]) -> list[str]:
    """Convert, in place, each column of ``X`` and ``Y`` whose header stated another unit.

    Parameters
    ----------
    protocol : Protocol
    X : ndarray of shape (n_runs, n_factors)
    Y : dict of str to ndarray of shape (n_runs,)
    convert : dict of str to Conversion or None
        By column name; None (the unit cannot be converted) leaves the values as read.
    wheres : list of str
        Each row as messages name it ("row 5 (run R1)").

    Returns
    -------
    list of str
        A problem for each value the conversion took past
        ``settings.MAX_INPUT_MAGNITUDE`` or out of the doubles (an overflow is
        never read as "not measured").
    """
    problems: list[str] = []
    columns = [(f.name, X[:, q]) for q, f in enumerate(protocol.factors)] + list(Y.items())
    for name, column in columns:
        conv = convert.get(name)
        if conv is None:
            continue
        with np.errstate(over="ignore", invalid="ignore"):
            new = conv.apply(column)
        bad = np.isfinite(column) & ~(np.abs(new) <= settings.MAX_INPUT_MAGNITUDE)
        for k in np.flatnonzero(bad)[:10]:
            what = (f"beyond the {settings.MAX_INPUT_MAGNITUDE:.0e} the tool computes with safely"
                    if np.isfinite(new[k]) or np.isinf(new[k]) else "not a number")
            problems.append(
                f"{wheres[k]}, column {name}: {column[k]:g} [{conv.source}] converts to "
                f"{new[k]:.3g} [{conv.target}], {what}; check the unit in the header"
            )
        column[:] = new
    return problems


def factor_value_flags(protocol: Protocol, X: np.ndarray, wheres: list[str],
                       convert: dict[str, object]) -> list[str]:
    """A flag for each factor value off its levels or outside its bounds, and for each run that
    breaks a rule of the protocol's ``[[constraints]]`` (the values are kept).

    Parameters
    ----------
    protocol : Protocol
    X : ndarray of shape (n_runs, n_factors)
        In protocol units; NaN where empty or not a number.
    wheres : list of str
        Each run as messages name it ("row 5 (run R1)"); runs past its end are not judged.
    convert : dict of str to Conversion or None
    """
    flags = []
    for k, where in enumerate(wheres):
        for q, f in enumerate(protocol.factors):
            v = X[k, q]
            if not np.isfinite(v) or _unconvertible(convert, f.name):
                continue
            tol = settings.FACTOR_VALUE_RTOL * max(1.0, abs(f.high))
            if f.kind == "discrete":
                if min(abs(v - lv) for lv in f.levels) > tol:
                    flags.append(f"{where}, column {f.name}: {v:g} is not one of the levels "
                                 f"{list(f.levels)} (kept)")
            elif v < f.low - tol or v > f.high + tol:
                flags.append(f"{where}, column {f.name}: {v:g} is outside the bounds "
                             f"[{f.low:g}, {f.high:g}] (kept)")
    return flags + _rule_flags(protocol, X, wheres, convert)


def _rule_flags(protocol: Protocol, X: np.ndarray, wheres: list[str], convert: dict[str, object]) -> list[str]:
    """A flag for each run that breaks a rule by more than ``settings.RUN_RULE_TOL`` (factor-scaled)."""
    if not protocol.constraints or any(_unconvertible(convert, n) for n in protocol.factor_names):
        return []
    space = protocol.design_space()
    A, b = space.normalise_rows(space.A_ub, space.b_ub)
    n = len(wheres)
    with np.errstate(invalid="ignore"):
        broken = X[:n] @ A.T - b > settings.RUN_RULE_TOL  # False where a value is missing (NaN)
    return [f"{wheres[k]}: breaks the rule {space.ub_labels[i]} (kept)" for k, i in zip(*np.nonzero(broken))]


def mixture_total_problems(protocol: Protocol, X: np.ndarray, wheres: list[str],
                           convert: dict[str, object]) -> list[str]:
    """A problem for each run whose components miss the mixture total by more than its tolerance.

    Runs with a component empty are skipped, and so is every run when a
    component's unit cannot be converted. Parameters as for
    :func:`factor_value_flags`.
    """
    mixture = protocol.mixture
    comp = [q for q, f in enumerate(protocol.factors) if f.kind == "component"]
    if mixture is None or not comp or any(_unconvertible(convert, protocol.factors[q].name) for q in comp):
        return []
    problems, missed = [], []
    for k, where in enumerate(wheres):
        if not np.all(np.isfinite(X[k, comp])):
            continue
        total = float(X[k, comp].sum())
        if abs(total - mixture.total) > mixture.tolerance:
            missed.append((where, total))
            problems.append(
                f"{where}: the components add up to {total:.6g}, not {mixture.total:g} "
                f"(tolerance {mixture.tolerance:g})"
            )
    scaled = _scale_mistake(mixture.total, [t for _, t in missed])
    if len(missed) > 1 and scaled:
        first, last = missed[0][0], missed[-1][0]
        return [f"{len(missed)} runs ({first} to {last}): the components add up to about "
                f"{scaled[0]:g}, not {mixture.total:g}; {scaled[1]}"]
    return problems


def _count_problem(events: float, subjects: float) -> str | None:
    """Why a pair of counts (either may be NaN: empty) cannot be used, or None."""
    if np.isnan(events) != np.isnan(subjects):
        return "give both counts, or leave both empty if not measured"
    if np.isnan(events):
        return None
    if events != np.floor(events) or subjects != np.floor(subjects):
        return f"counts must be whole numbers (got {events:g} of {subjects:g})"
    if subjects < 1:
        return f"the number of subjects must be at least 1 (got {subjects:g})"
    if not 0 <= events <= subjects:
        return f"the number of events must lie between 0 and the number of subjects (got {events:g} of {subjects:g})"
    return None


def binomial_counts(protocol: Protocol, Y: dict[str, np.ndarray], wheres: list[str],
                    problems: list[str], absent=()) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Replace, in ``Y``, each binomial response's count columns by its rate; return the counts.

    Parameters
    ----------
    protocol : Protocol
    Y : dict of str to ndarray
        By runs-file column; changed in place: the events and subjects columns
        of a binomial response (the objective or a limit) are removed and its rate added (NaN where
        not measured or where the counts are a problem).
    wheres : list of str
        Each run as messages name it.
    problems : list of str
        Appended to, naming the row and both columns.
    absent : collection of str
        Count columns the header lacks (the header's check names them once): their
        rows are not judged, as no row could hold the count.
    """
    counts = {}
    for lim in protocol.binomial_responses:  # the objective and the limits given as counts
        events, subjects = Y.pop(lim.events), Y.pop(lim.subjects)
        judged = wheres if lim.events not in absent and lim.subjects not in absent else []
        for k, where in enumerate(judged):
            problem = _count_problem(events[k], subjects[k])
            if problem:
                problems.append(f"{where}, columns {lim.events}/{lim.subjects}: {problem}")
                events[k] = subjects[k] = np.nan
        with np.errstate(invalid="ignore", divide="ignore"):
            Y[lim.name] = events / subjects
        counts[lim.name] = (events, subjects)
    return counts


def missing_column_problem(protocol: Protocol, name: str) -> str:
    """A runs file's header lacks the column ``name``; a binomial count column is named with its
    response and which of its counts (events or subjects) it holds."""
    counts = {c for item in protocol.binomial_responses for c in (item.events, item.subjects)}
    if name in counts:
        return f"missing column {name!r} ({dict(protocol.response_roles())[name]})"
    return f"missing column {name!r}"


def rate_column_problem(limit, label: str) -> str:
    """Why a column holding a binomial response's rate (objective or limit) is refused, and what to give instead."""
    return (f"{label}: {limit.name!r} is a binomial response and a rate alone cannot be used: give the "
            f"number of events in column {limit.events!r} and the number of subjects in column "
            f"{limit.subjects!r} (for example 1 and 6, not 0.1667)")
def _scale_mistake(total: float, sums: list[float]) -> tuple[float, str] | None:
    """(the total the runs use, what to do) when every run's components fit percent against fractions."""
    for factor, hint in ((100.0, "the runs are in percent and the protocol in fractions: give the runs "
                          "as fractions, or write the protocol in percent (`total = 100` in its [mixture] "
                          "table and the component bounds in percent)"),
                         (0.01, "the runs are in fractions and the protocol in percent: give the runs in "
                          "percent, or set `total = 1` in the protocol's [mixture] table")):
        target = total * factor
        if sums and all(abs(s - target) <= 0.01 * target for s in sums):
            return target, hint
    return None
