"""Checks on a runs table's units, and on its values once in the protocol's units.

A unit stated in a column header is converted to the protocol's, or
refused where that is not safe (see :mod:`planner.inputs.units`). A factor
value outside its bounds, or off a discrete factor's levels, is kept and
flagged; a run whose components miss the mixture total is a problem. The
values of a column whose stated unit cannot be converted are not judged.
"""

from __future__ import annotations

import numpy as np

from guardband.planner import settings
from guardband.planner.inputs.protocol import Protocol
from guardband.planner.inputs.units import UnitError, conversion

__all__ = ["check_unit", "to_protocol_units", "factor_value_flags", "mixture_total_problems"]


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
                      convert: dict[str, object]) -> None:
    """Convert, in place, each column of ``X`` and ``Y`` whose header stated another unit.

    Parameters
    ----------
    protocol : Protocol
    X : ndarray of shape (n_runs, n_factors)
    Y : dict of str to ndarray of shape (n_runs,)
    convert : dict of str to Conversion or None
        By column name; None (the unit cannot be converted) leaves the values as read.
    """
    for q, f in enumerate(protocol.factors):
        conv = convert.get(f.name)
        if conv is not None:
            X[:, q] = conv.apply(X[:, q])
    for r, y in Y.items():
        conv = convert.get(r)
        if conv is not None:
            y[:] = conv.apply(y)


def factor_value_flags(protocol: Protocol, X: np.ndarray, wheres: list[str],
                       convert: dict[str, object]) -> list[str]:
    """A flag for each factor value off its levels or outside its bounds (the value is kept).

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
    return flags


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
