"""The calibration a campaign has earned: planned runs that broke a limit against the promise.

Each planned run was proposed with a joint figure ``q_i``, the screen's
figure for "meets every limit". If the promises hold, the number of
measured planned runs that broke a limit is at most a sum of independent
Bernoulli(1 - q_i) draws: a Poisson-binomial count with mean
``sum(1 - q_i)``. Its upper tail ``P(B >= b)`` is computed exactly by the
usual convolution (Poisson-binomial recursion; see e.g. Hong 2013,
Computational Statistics & Data Analysis 59, 41-51, from memory). A small
tail probability means the history contradicts the promise.

Runs in a batch are not independent (they share the models), so the tail
probability is a plain-words alarm, not a formal test; the warning says so.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["EarnedCalibration", "earned_calibration", "poisson_binomial_tail", "CONTRADICTION_LEVEL"]

#: Below this tail probability the history is said to contradict the promise.
CONTRADICTION_LEVEL = 0.05


def poisson_binomial_tail(rates, k: int) -> float:
    """P(sum of independent Bernoulli(rates_i) >= k), exactly (O(n^2))."""
    rates = np.clip(np.asarray(rates, dtype=float), 0.0, 1.0)
    if k <= 0:
        return 1.0
    dist = np.zeros(rates.size + 1)
    dist[0] = 1.0
    for r in rates:
        dist[1:] = dist[1:] * (1.0 - r) + dist[:-1] * r
        dist[0] *= 1.0 - r
    return float(np.clip(dist[k:].sum(), 0.0, 1.0))


@dataclass(frozen=True)
class EarnedCalibration:
    """Measured planned runs, how many broke a limit, and how many the promises allowed."""

    n_measured: int
    n_broke: int
    expected_broke: float
    tail_probability: float
    broke_run_ids: tuple[str, ...] = ()

    @property
    def contradicts(self) -> bool:
        return self.n_measured > 0 and self.tail_probability < CONTRADICTION_LEVEL

    def to_dict(self) -> dict:
        return {"n_measured": self.n_measured, "n_broke": self.n_broke,
                "expected_broke": round(self.expected_broke, 6),
                "tail_probability": round(self.tail_probability, 6),
                "contradicts_promise": self.contradicts, "broke_run_ids": list(self.broke_run_ids)}

    @classmethod
    def from_dict(cls, d: dict) -> EarnedCalibration:
        """The inverse of :meth:`to_dict` (as recorded in a plan record's ``calibration_earned``)."""
        return cls(int(d["n_measured"]), int(d["n_broke"]), float(d["expected_broke"]),
                   float(d["tail_probability"]), tuple(str(r) for r in d.get("broke_run_ids", ())))

    def sentence(self) -> str:
        if self.n_measured == 0:
            return "calibration so far: no planned run of this campaign has been measured yet"
        text = (f"calibration so far: {self.n_broke} of {self.n_measured} measured planned runs broke a limit, "
                f"against about {self.expected_broke:.2g} allowed by the joint figures they were proposed with")
        if self.contradicts:
            text += (f"; WARNING: if the promises held, {self.n_broke} or more breaks would happen with "
                     f"probability {self.tail_probability:.2g}. The models' probabilities look too optimistic "
                     "for this study: raise the threshold, add runs near the limits, or review the models "
                     "with a qualified person before the next runs")
        return text


def earned_calibration(promised, broke, run_ids=()) -> EarnedCalibration:
    """Summarise planned runs.

    Parameters
    ----------
    promised : array of shape (n,)
        The joint figure each planned run was proposed with.
    broke : bool array of shape (n,)
        Whether its measured values broke a limit.
    run_ids : sequence of str, optional
    """
    promised = np.asarray(promised, dtype=float)
    broke = np.asarray(broke, dtype=bool)
    rates = 1.0 - promised
    ids = tuple(str(r) for r, b in zip(run_ids, broke) if b)
    return EarnedCalibration(int(broke.size), int(broke.sum()), float(rates.sum()),
                             poisson_binomial_tail(rates, int(broke.sum())), ids)
