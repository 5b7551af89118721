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

__all__ = ["loo_summary", "widen_from_loo", "looks_overconfident"]


def loo_summary(model, y) -> tuple[float, float]:
    """(coverage, rmse) of the model's leave-one-out predictions of ``y``."""
    loo = model.loo()
    if hasattr(loo, "lo"):  # a rate's leave-one-out interval (binomial model): its own quantiles
        y = np.asarray(y, dtype=float)
        inside = (y >= loo.lo - 1e-12) & (y <= loo.hi + 1e-12)
    else:
        inside = np.abs(loo.residual) <= Z95 * np.sqrt(loo.variance)
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
