"""Arrays as the design space hands them out: read-only, and as plain JSON values."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

__all__ = ["read_only", "nan_to_none"]


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
