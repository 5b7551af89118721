"""Arrays as the design space hands them out: read-only, as plain JSON values; a segment's last good point."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

__all__ = ["read_only", "nan_to_none", "last_good_point"]


def read_only(array: np.ndarray) -> np.ndarray:
    """Mark ``array`` read-only in place and return it."""
    array.setflags(write=False)
    return array


def nan_to_none(value: Any) -> Any:
    """Turn numpy values into plain Python ones, NaN and infinities into None.

    Parameters
    ----------
    value : ndarray, list, tuple, number or other
        Arrays, lists and tuples become lists (nested); other values pass
        through unchanged.

    Returns
    -------
    object
        Ready for :func:`guardband.safety.ledger.to_jsonable`, which refuses
        NaN: a number missing here (an empty space has no range) is None.
    """
    if isinstance(value, np.ndarray):
        return [nan_to_none(v) for v in value.tolist()]
    if isinstance(value, (list, tuple)):
        return [nan_to_none(v) for v in value]
    if isinstance(value, (float, np.floating)):
        value = float(value)
        return None if not math.isfinite(value) else value
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.bool_):
        return bool(value)
    return value


def last_good_point(ok, start: np.ndarray, end: np.ndarray, *, steps: int = 40) -> np.ndarray:
    """``end`` if ``ok(end)``; else the last point found good on the segment from ``start`` (good).

    Bisection on the segment's parameter, ``steps`` halvings: for a convex
    set that holds ``start`` (a polytope, the points meeting a limit that is
    convex along the segment) the answer is within ``2**-steps`` of the
    segment's last good point, and always good itself. An optimiser can stop
    a hair outside a linear rule or a limit it was asked to keep; this brings
    its answer back instead of throwing it away.
    """
    if ok(end):
        return end
    lo, hi = 0.0, 1.0
    for _ in range(steps):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if ok(start + mid * (end - start)) else (lo, mid)
    return start + lo * (end - start)
