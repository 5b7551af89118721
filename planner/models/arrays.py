"""Checks of the arrays a model is given: validated once, at the edge."""

from __future__ import annotations

import numpy as np

from guardband.planner.errors import ModelError

__all__ = ["check_data", "check_points"]


def check_data(X, y):
    """Checked float copies of X, shape (n, d), and y, shape (n,)."""
    try:
        X = np.array(X, dtype=float, copy=True)
        y = np.array(y, dtype=float, copy=True)
    except (TypeError, ValueError) as exc:
        raise ModelError(f"X and y must be numeric arrays: {exc}") from None
    if X.ndim != 2:
        raise ModelError(f"X must have shape (n_runs, n_factors); got shape {X.shape}")
    if y.ndim != 1:
        raise ModelError(f"y must have shape (n_runs,); got shape {y.shape}")
    n, d = X.shape
    if n == 0:
        raise ModelError("no runs to fit: a model needs at least one run with a measured response")
    if d == 0:
        raise ModelError("X has no factor columns; a model needs at least one factor")
    if y.size != n:
        raise ModelError(f"y must have one value per run of X ({y.size} values != {n} runs)")
    bad_x = ~np.all(np.isfinite(X), axis=1)
    if bad_x.any():
        rows = np.flatnonzero(bad_x).tolist()
        raise ModelError(
            f"X contains NaN or infinite values in runs {_first(rows)}; correct or remove those runs before fitting"
        )
    bad_y = ~np.isfinite(y)
    if bad_y.any():
        rows = np.flatnonzero(bad_y).tolist()
        raise ModelError(
            f"y contains NaN or infinite values in runs {_first(rows)}; correct or remove those runs before fitting"
        )
    X.setflags(write=False)
    y.setflags(write=False)
    return X, y


def _first(rows: list[int], k: int = 10) -> str:
    shown = ", ".join(str(r) for r in rows[:k])
    return f"[{shown}{', ...' if len(rows) > k else ''}]"


def check_points(Xs, n_factors: int, name: str = "Xs") -> np.ndarray:
    """Checked float array of points, shape (n_points, n_factors)."""
    try:
        Xs = np.asarray(Xs, dtype=float)
    except (TypeError, ValueError) as exc:
        raise ModelError(f"{name} must be a numeric array: {exc}") from None
    if Xs.ndim != 2 or Xs.shape[1] != n_factors:
        raise ModelError(f"{name} must have shape (n_points, {n_factors}); got shape {Xs.shape}")
    if not np.isfinite(Xs).all():
        rows = np.flatnonzero(~np.all(np.isfinite(Xs), axis=1)).tolist()
        raise ModelError(f"{name} contains NaN or infinite values in rows {_first(rows)}")
    return Xs

