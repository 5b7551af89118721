"""Checks of a fitted model against its own runs: leave-one-out coverage and widening.

A limit model is checked by its closed-form leave-one-out predictions
(Rasmussen & Williams 2006, eqs. 5.10-5.12). Its coverage (the share of
measured values inside their leave-one-out 95% interval) is reported, a
model below :data:`~guardband.planner.settings.COVERAGE_WARNING` is flagged,
and an overconfident limit model is widened (:func:`widen_from_loo`).
"""

from __future__ import annotations

import numpy as np

from guardband.planner.settings import COVERAGE_MIN_RUNS, COVERAGE_WARNING, Z95

__all__ = ["loo_interval", "loo_summary", "widen_from_loo", "looks_overconfident"]


def loo_interval(model, y=None, loo=None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(lower, upper, inside) of each run's leave-one-out 95% interval, in the response's units.

    A Gaussian model's interval is mean -/+ 1.96 sd of a new measurement; a
    binomial model's is the 2.5% and 97.5% quantiles of the measured rate
    (inside [0, 1]). ``inside``: the measured value (``y``, default the
    model's own) lies within it; ``loo`` the model's leave-one-out, when already computed.
    """
    loo = model.loo() if loo is None else loo
    y = np.asarray(model.y if y is None else y, dtype=float)
    if hasattr(loo, "lo"):
        return loo.lo, loo.hi, (y >= loo.lo - 1e-12) & (y <= loo.hi + 1e-12)
    half = Z95 * np.sqrt(np.asarray(loo.variance, dtype=float))
    return loo.mean - half, loo.mean + half, np.abs(loo.residual) <= half


def loo_summary(model, y) -> tuple[float, float]:
    """(coverage, rmse) of the model's leave-one-out predictions of ``y`` (its own measured values)."""
    loo = model.loo()
    inside = loo_interval(model, y, loo)[2]
    return float(np.mean(inside)), float(np.sqrt(np.mean(loo.residual**2)))


def looks_overconfident(coverage: float | None, n_runs: int) -> bool:
    """The coverage rule: too few measured values inside their leave-one-out 95% interval."""
    return coverage is not None and coverage < COVERAGE_WARNING and n_runs >= COVERAGE_MIN_RUNS


def widen_from_loo(model):
    """Widen an overconfident model by its own leave-one-out check.

    The standardised leave-one-out errors ``u_i = (y_i - mu_-i) / sd_-i``
    have mean square 1 under a calibrated model. When their mean square
    ``c^2`` exceeds 1 the signal and noise variances are both multiplied by
    ``c^2``: the posterior mean is unchanged and every predictive sd grows
    by ``c`` (so the leave-one-out mean square becomes 1). This is the
    cross-validation estimate of the variance parameter of Bachoc (2013,
    Computational Statistics & Data Analysis 66, 55-69; from memory), which
    is more robust than maximum likelihood when the kernel is wrong. It is
    applied only upward: a model is never made more confident than its fit.
    Returns ``(model, c)``.
    """
    loo = model.loo()
    u2 = loo.residual**2 / np.maximum(loo.variance, 1e-300)
    c2 = float(np.mean(u2))
    if not np.isfinite(c2) or c2 <= 1.0:
        return model, 1.0
    out = model.with_variances_scaled(
        c2, f"predictive sd widened by {np.sqrt(c2):.3g} (mean square of the standardised "
            f"leave-one-out errors {c2:.3g} > 1)")
    return out, float(np.sqrt(c2))
