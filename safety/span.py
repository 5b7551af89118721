"""The tested span: the box the runs that met every limit span, and how its push grows.

The screen's rule 3b (:mod:`guardband.safety.screen`) excludes candidates
beyond this box, each side pushed out by ``span_reach`` times its width;
a planning step doubles the push for each of the latest runs in a row that
extended the box and met every limit (:func:`span_streak`). Works on
unit-scaled numbers only.
"""

from __future__ import annotations

import numpy as np

__all__ = ["tested_span", "span_streak"]


def tested_span(anchors, reach: float, floor: float) -> tuple[np.ndarray, np.ndarray]:
    """The box the anchors span (unit-scaled), each side pushed out by ``reach`` x width (>= floor)."""
    lo, hi = anchors.min(axis=0), anchors.max(axis=0)
    pad = np.maximum(reach * (hi - lo), floor)
    return lo - pad, hi + pad


def span_streak(U, met, columns=None) -> int:
    """How many of the latest runs in a row extended the tested span and met every limit.

    Runs are taken in order. A run *extends* the span when it lies outside
    the box of the earlier runs that met every limit (in ``columns``); each
    such run that met every limit adds one, and any run that broke a limit
    ends the streak (sets it to 0). This is the success count of a trust
    region (Eriksson et al. 2019, "Scalable global optimization via local
    Bayesian optimization", NeurIPS; from memory), read off the runs
    themselves so that a plan stays a function of its inputs.

    Parameters
    ----------
    U : array of shape (n_runs, k)
        Measured runs, unit-scaled, in the order they were made.
    met : bool array of shape (n_runs,)
        Whether each run met every limit.
    columns : bool array of shape (k,), optional
        The columns the span rule applies to (default all).

    Returns
    -------
    int
    """
    U = np.asarray(U, dtype=float)
    cols = np.ones(U.shape[1], dtype=bool) if columns is None else np.asarray(columns, dtype=bool)
    lo = hi = None
    streak = 0
    for u, ok in zip(U[:, cols], np.asarray(met, dtype=bool)):
        if not ok:
            streak = 0
            continue
        if lo is not None and np.any((u < lo - 1e-12) | (u > hi + 1e-12)):
            streak += 1
        lo = u.copy() if lo is None else np.minimum(lo, u)
        hi = u.copy() if hi is None else np.maximum(hi, u)
    return streak
