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

For simulated campaigns, where every planned run's truth is known,
:func:`binned_calibration` bins the promised figures (a reliability table:
mean promise against the share that met every limit in each bin) with the
exact binomial interval of each share (:func:`clopper_pearson`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["EarnedCalibration", "earned_calibration", "poisson_binomial_tail", "CONTRADICTION_LEVEL",
           "clopper_pearson", "binned_calibration", "RELIABILITY_EDGES"]

#: Below this tail probability the history is said to contradict the promise.
CONTRADICTION_LEVEL = 0.05
#: Inner edges of the bins of promised joint figures above a threshold t:
#: [t, 0.9), [0.9, 0.95), [0.95, 0.99), [0.99, 1] (edges at or below t are dropped).
RELIABILITY_EDGES = (0.9, 0.95, 0.99)


def clopper_pearson(k: int, n: int, confidence: float = 0.95) -> tuple[float, float]:
    """The exact (Clopper-Pearson) interval of a binomial share, k successes out of n; NaN for n = 0.

    Clopper & Pearson (1934), Biometrika 26:404-413: the ends are quantiles
    of beta distributions, Beta(k, n - k + 1) at alpha/2 and
    Beta(k + 1, n - k) at 1 - alpha/2, with 0 for k = 0 and 1 for k = n.
    """
    from scipy.stats import beta

    k, n = int(k), int(n)
    if n == 0:
        return float("nan"), float("nan")
    if not 0 <= k <= n:
        raise ValueError(f"need 0 <= k <= n, got k={k}, n={n}")
    alpha = 1.0 - float(confidence)
    low = 0.0 if k == 0 else float(beta.ppf(alpha / 2, k, n - k + 1))
    high = 1.0 if k == n else float(beta.ppf(1 - alpha / 2, k + 1, n - k))
    return low, high


def _bin_edges(threshold: float) -> list[float]:
    inner = [e for e in RELIABILITY_EDGES if e > threshold]
    return [float(threshold), *inner, 1.0]


def binned_calibration(promised, met, threshold: float, *, confidence: float = 0.95) -> list[dict]:
    """Promised joint figures binned, against the share of those runs that met every limit.

    Parameters
    ----------
    promised : array of float
        The joint figure each run was proposed with (NaN: no promise; left out).
    met : array of bool
        Whether each run met every limit (by its true values).
    threshold : float
        The screen's threshold t: the bins are [t, 0.9), [0.9, 0.95),
        [0.95, 0.99) and [0.99, 1] (:data:`RELIABILITY_EDGES` above t), and
        [0, t) in front when a promise fell below t.
    confidence : float
        Of the exact interval (:func:`clopper_pearson`).

    Returns
    -------
    list of dict
        One per bin, empty bins included: ``low``, ``high`` (the bin's
        ends; the last bin includes 1), ``runs``, ``met``, ``met_share``,
        ``mean_promised``, ``ci_low``, ``ci_high`` (NaN for an empty bin).
    """
    p = np.asarray(promised, dtype=float).ravel()
    m = np.asarray(met, dtype=bool).ravel()
    if p.shape != m.shape:
        raise ValueError(f"promised and met differ in length ({p.size} and {m.size})")
    has = np.isfinite(p)
    p, m = p[has], m[has]
    edges = _bin_edges(threshold)
    if np.any(p < edges[0]):
        edges = [0.0, *edges]
    out = []
    for i, (lo, hi) in enumerate(zip(edges[:-1], edges[1:])):
        last = i == len(edges) - 2
        inside = (p >= lo) & ((p <= hi) if last else (p < hi))
        n, k = int(inside.sum()), int(m[inside].sum())
        ci = clopper_pearson(k, n, confidence)
        out.append({"low": lo, "high": hi, "runs": n, "met": k,
                    "met_share": k / n if n else float("nan"),
                    "mean_promised": float(np.mean(p[inside])) if n else float("nan"),
                    "ci_low": ci[0], "ci_high": ci[1]})
    return out


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
    #: (run id, what differs) of measured runs with a planned run's id but other settings than
    #: proposed: their promise was made for another recipe, so they are not counted
    not_as_proposed: tuple[tuple[str, str], ...] = ()

    @property
    def contradicts(self) -> bool:
        return self.n_measured > 0 and self.tail_probability < CONTRADICTION_LEVEL

    def to_dict(self) -> dict:
        out = {"n_measured": self.n_measured, "n_broke": self.n_broke,
               "expected_broke": round(self.expected_broke, 6),
               "tail_probability": round(self.tail_probability, 6),
               "contradicts_promise": self.contradicts, "broke_run_ids": list(self.broke_run_ids)}
        if self.not_as_proposed:  # only then: a campaign without such runs keeps its record as before
            out["not_as_proposed_run_ids"] = [rid for rid, _ in self.not_as_proposed]
            out["not_as_proposed"] = [what for _, what in self.not_as_proposed]
        return out

    @classmethod
    def from_dict(cls, d: dict) -> EarnedCalibration:
        """The inverse of :meth:`to_dict` (as recorded in a plan record's ``calibration_earned``)."""
        changed = tuple(zip(map(str, d.get("not_as_proposed_run_ids", ())), map(str, d.get("not_as_proposed", ()))))
        return cls(int(d["n_measured"]), int(d["n_broke"]), float(d["expected_broke"]),
                   float(d["tail_probability"]), tuple(str(r) for r in d.get("broke_run_ids", ())), changed)

    def sentence(self) -> str:
        changed = "".join(f"; not counted: {rid} (made with other settings than proposed: {what})"
                          for rid, what in self.not_as_proposed)
        if self.n_measured == 0:
            return "calibration so far: no planned run of this campaign has been measured yet" + changed
        text = (f"calibration so far: {self.n_broke} of {self.n_measured} measured planned runs broke a limit, "
                f"against about {self.expected_broke:.2g} allowed by the joint figures they were proposed with")
        text += changed
        if self.contradicts:
            text += (f"; WARNING: if the promises held, {self.n_broke} or more breaks would happen with "
                     f"probability {self.tail_probability:.2g}. The models' probabilities look too optimistic "
                     "for this study: raise the threshold, add runs near the limits, or review the models "
                     "with a qualified person before the next runs")
        return text


def earned_calibration(promised, broke, run_ids=(), not_as_proposed=()) -> EarnedCalibration:
    """Summarise planned runs.

    Parameters
    ----------
    promised : array of shape (n,)
        The joint figure each planned run was proposed with.
    broke : bool array of shape (n,)
        Whether its measured values broke a limit.
    run_ids : sequence of str, optional
    not_as_proposed : sequence of (str, str), optional
        (run id, what differs) of runs left out because they were made with other settings.
    """
    promised = np.asarray(promised, dtype=float)
    broke = np.asarray(broke, dtype=bool)
    rates = 1.0 - promised
    ids = tuple(str(r) for r, b in zip(run_ids, broke) if b)
    return EarnedCalibration(int(broke.size), int(broke.sum()), float(rates.sum()),
                             poisson_binomial_tail(rates, int(broke.sum())), ids, tuple(not_as_proposed))
