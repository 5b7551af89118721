"""The safety screen: hard rules, per-limit probabilities and the joint figure.

Every candidate ends either surviving or excluded with one reason that names
the rule, the limit, the probability and the threshold. Rules are applied
in a fixed order and the first one that fails is the recorded reason; the
probabilities are still computed for every candidate so that a reviewer
can see how near each near miss came.

1. ``outside-design-space``: not inside the polytope and discrete levels.
2. ``forbidden-region``: inside a region the protocol forbids.
3. ``step-too-large``: farther from the nearest run that met every limit
   than the protocol's ``max_step`` (unit-scaled distance over the free
   factors, divided by sqrt(number of free factors), so 1 is the diagonal).
3b. ``beyond-tested-span``: outside the box that the runs that met every
   limit span, each side pushed out by ``span_reach`` times that side's
   width (and at least ``span_floor``, unit-scaled). A model that has only
   seen a region reads alike everywhere in it; this rule keeps each step's
   extrapolation in proportion to what has been tested, so the region grows
   only as far as runs at its edge come back within the limits. The push
   doubles for each of the latest runs in a row (up to ``span_growth``)
   that extended the span and met every limit (:func:`guardband.safety.span.span_streak`).
3c. ``skips-untried-level`` (protocol ``[escalation] no_skipping``): a
   discrete factor more than one level above the highest level given in a
   run that met every limit, or more than one factor above theirs at once.
4. ``too-few-runs`` / ``model-not-fitted`` (fail closed): a limit whose
   model cannot vouch for anything excludes every candidate.
4b. ``above-broken-cohort``: a monotone limit (a toxicity rate that never
   falls as a dose rises) was broken by a run whose every dose is at or
   below the candidate's; the candidate's probability of meeting it is 0.
5. ``limit-probability``: P(limit i met) below that limit's probability.
6. ``joint-below-threshold``: the joint figure below the screen threshold.
7. ``rests-on-one-run``: 5 and 6 hold with every run counted, but not
   with one run left out (the single-run check of
   :mod:`guardband.planner.models.guards`); the detail names that run.
   Rules 5 and 6 are judged with every run counted, so this reason marks
   exactly the candidates the check alone excluded.

Per-limit probabilities use the predictive distribution of a new
*measurement* (latent variance plus noise variance), because the limit
applies to what the lab will measure. The joint figure is by default the
bound max(0, 1 - sum(1 - p_i)) (Boole/Bonferroni), valid whatever the
correlation between limits; the product of the p_i (independence) is used
only when the protocol names it.

A binomial limit (events among subjects) is judged on the true rate: its
model's mean and sd are of the latent logit of the rate, which is Gaussian
under the Laplace approximation, so P(rate <= L) = Phi((logit L - mean) / sd)
exactly; the limit's bounds are moved to the logit scale here, in one place.
A monotone limit's probability at each point is the least over the point
itself, every other point judged with it, every run and every point of the
rule's fixed lattice (all combinations of the discrete levels) at lower or
equal values of every free factor (:func:`monotone_envelope`). With discrete
doses the lattice holds every candidate, so a point's figure does not depend
on which points are judged with it.

This module works on numbers (means, standard deviations, distances); it
does not fit models and does not import the command line.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field, replace

import numpy as np
from scipy.special import ndtr

from guardband.safety.limits import ForbiddenRegion, LimitRule, ScreenRules, within_limit
from guardband.safety.span import tested_span

#: Slack when testing ``A x <= b`` for a forbidden region (the same
#: feasibility tolerance as the design space's; the rows are normalised by
#: ``DesignSpace.normalise_rows``, so it means the same at any scale).
REGION_TOL = 1e-9

__all__ = [
    "REASONS",
    "REASON_TEXT",
    "LimitPrediction",
    "MonotoneBasis",
    "monotone_envelope",
    "above_broken",
    "HardRules",
    "ScreenResult",
    "Texts",
    "limit_probability",
    "met_probability",
    "limit_predictions",
    "probabilities_at",
    "joint_at",
    "figures_at",
    "joint_figure",
    "forbidden_mask",
    "hard_rules",
    "run_screen",
    "screen_points",
    "step_distance",
]

#: Exclusion reasons in the order they are applied.
REASONS = (
    "outside-design-space",
    "forbidden-region",
    "step-too-large",
    "beyond-tested-span",
    "skips-untried-level",
    "too-few-runs",
    "model-not-fitted",
    "above-broken-cohort",
    "limit-probability",
    "joint-below-threshold",
    "rests-on-one-run",
)

#: Each reason (and "survived") in words, for tables, reports and notes.
REASON_TEXT = {
    "survived": "passed every rule and reached the threshold",
    "outside-design-space": "outside the design space (bounds, mixture total, ratio limits, levels)",
    "forbidden-region": "inside a region the protocol forbids",
    "step-too-large": "too far from the nearest run that met every limit",
    "beyond-tested-span": "beyond the span of the runs that met every limit (span_reach)",
    "skips-untried-level": "would skip an untried dose level, or raise two factors at once (escalation)",
    "too-few-runs": "a limit has too few runs to vouch for anything (fail closed)",
    "model-not-fitted": "a limit's model could not be fitted (fail closed)",
    "above-broken-cohort": "at or above the doses of a cohort that broke a monotone limit",
    "limit-probability": "a limit's probability below its requirement",
    "joint-below-threshold": "joint figure below the screen threshold",
    "rests-on-one-run": "would pass only if a single run is trusted: with that run left out it fails",
}


@dataclass(frozen=True)
class LimitPrediction:
    """What a limit's model says at the candidates, or why it cannot say.

    ``status`` is "ok" (mean and sd given), "too-few-runs" or
    "model-not-fitted" (then ``message`` says why and every candidate is
    excluded by this limit).
    """

    name: str
    probability: float
    lower: float | None
    upper: float | None
    status: str = "ok"
    mean: np.ndarray | None = None
    sd: np.ndarray | None = None
    message: str = ""
    #: the mean and sd with every run counted (before the single-run check), and
    #: the run id the check leaned on at each point ("" where it changed nothing)
    mean_all: np.ndarray | None = None
    sd_all: np.ndarray | None = None
    leaning: np.ndarray | None = None
    scale: str = "response"  # or "logit": mean and sd of the logit of a binomial rate
    monotone: MonotoneBasis | None = None

    def p_met(self) -> np.ndarray:
        """P(the limit is met) at each point (before any monotone envelope)."""
        return limit_probability(self.mean, self.sd, lower=self.lower, upper=self.upper, scale=self.scale)


@dataclass(frozen=True)
class MonotoneBasis:
    """What a monotone limit's envelope needs: the points judged and the runs, unit-scaled.

    ``anchor_p`` is each run's own probability of meeting the limit;
    ``anchor_broke`` marks the runs whose measured value broke it (a
    binomial model pools the runs at one point: events over subjects).
    """

    points: np.ndarray
    anchors: np.ndarray
    anchor_p: np.ndarray
    anchor_broke: np.ndarray


#: Slack when comparing unit-scaled coordinates for "at or below" (dominance).
DOMINANCE_TOL = 1e-9


def _dominated_min(values_at, A, B) -> np.ndarray:
    """For each row b of B, the least values_at[a] over rows a of A with a <= b in every column (inf if none)."""
    out = np.full(B.shape[0], np.inf)
    for start in range(0, B.shape[0], 256):
        block = B[start:start + 256]
        below = np.all(A[None, :, :] <= block[:, None, :] + DOMINANCE_TOL, axis=2)  # (b, a)
        out[start:start + 256] = np.min(np.where(below, values_at[None, :], np.inf), axis=1, initial=np.inf)
    return out


def monotone_envelope(p, basis: MonotoneBasis) -> np.ndarray:
    """Probabilities held monotone: never above those of the points or runs at lower or equal values.

    P_i <- min(P_i, min{P_j : x_j <= x_i}, min{P_run : x_run <= x_i}), and 0
    where a run at or below the point broke the limit. The pairwise work
    runs on the distinct points only (discrete doses repeat a lot).
    """
    p = np.asarray(p, dtype=float)
    if p.size == 0:
        return p
    uniq, inverse = np.unique(basis.points, axis=0, return_inverse=True)
    inverse = inverse.reshape(-1)
    pu = np.full(uniq.shape[0], np.inf)
    np.minimum.at(pu, inverse, p)
    out = np.minimum(pu, _dominated_min(pu, uniq, uniq))
    if basis.anchors.shape[0]:
        out = np.minimum(out, _dominated_min(basis.anchor_p, basis.anchors, uniq))
    return np.where(above_broken(basis, uniq), 0.0, out)[inverse]


def above_broken(basis: MonotoneBasis, points=None) -> np.ndarray:
    """Whether each point lies at or above (every free factor) a run that broke the limit."""
    points = basis.points if points is None else points
    broke = basis.anchors[np.asarray(basis.anchor_broke, dtype=bool)]
    if broke.shape[0] == 0:
        return np.zeros(points.shape[0], dtype=bool)
    return np.isfinite(_dominated_min(np.zeros(broke.shape[0]), broke, points))


def _logit_bound(v):
    return None if v is None else float(np.log(v) - np.log1p(-v))


def limit_probability(mean, sd, *, lower=None, upper=None, scale: str = "response") -> np.ndarray:
    """P(lower <= Y <= upper) for Y ~ N(mean, sd^2), elementwise.

    sd = 0 gives 1 or 0 according to whether the mean is within the limit.
    With ``scale="logit"``, ``mean`` and ``sd`` are of the logit of a rate
    whose limits ``lower`` and ``upper`` lie in (0, 1): the bounds move to
    the logit scale (the logit is increasing, so the event is the same).
    """
    if scale == "logit":
        lower, upper = _logit_bound(lower), _logit_bound(upper)
    mean = np.asarray(mean, dtype=float)
    sd = np.asarray(sd, dtype=float)
    if mean.ndim and mean.shape == sd.shape and (sd > 0).all():
        # the usual case, every sd positive: the same numbers with fewer array passes
        # (this runs tens of thousands of times in a step's local refinement)
        du = None if upper is None else upper - mean
        dl = None if lower is None else lower - mean
        return met_probability(du, dl, sd)
    safe_sd = np.where(sd > 0, sd, 1.0)
    p_up = np.ones_like(mean)
    p_low = np.zeros_like(mean)
    if upper is not None:
        p_up = np.where(sd > 0, ndtr((upper - mean) / safe_sd), (mean <= upper).astype(float))
    if lower is not None:
        p_low = np.where(sd > 0, ndtr((lower - mean) / safe_sd), (mean < lower).astype(float))
    return np.clip(p_up - p_low, 0.0, 1.0)


def met_probability(du, dl, sd, *, clip: bool = True) -> np.ndarray:
    """:func:`limit_probability` from the distances to the limits, for sd > 0 everywhere.

    ``du = upper - mean`` and ``dl = lower - mean`` (None for a side
    without a limit), arrays of the shape of ``sd``. Callers that ask
    about one mean at many sds (the widening's bisection) compute the
    distances once. The result is bit for bit that of
    :func:`limit_probability`: ``p - 0`` and the clip to [0, 1] of a
    one-sided figure change no value of ``ndtr``, which lies in [0, 1].
    ``clip=False`` leaves out the clip of a two-sided figure too (for a
    caller that only compares the figure with a probability below 1).
    """
    if du is not None:
        p = ndtr(du / sd)
        if dl is None:
            return p
        p -= ndtr(dl / sd)
        return np.clip(p, 0.0, 1.0) if clip else p
    if dl is not None:
        return 1.0 - ndtr(dl / sd)
    return np.ones_like(sd)


def _fmt_p(p: float, required: float) -> str:
    """Four decimals, or as many as it takes to show that p < required."""
    for digits in (4, 6, 9):
        text = f"{p:.{digits}f}"
        if float(text) < required:
            return text
    return repr(float(p))


def joint_figure(P, *, method: str = "bound") -> np.ndarray:
    """Joint figure from per-limit probabilities.

    Parameters
    ----------
    P : array of shape (n_candidates, n_limits)
    method : {"bound", "independent"}
        "bound": max(0, 1 - sum(1 - p_i)), which holds whatever the
        correlation between the limited responses; "independent": prod(p_i).
    """
    P = np.asarray(P, dtype=float)
    if P.ndim != 2:
        raise ValueError("P must have shape (n_candidates, n_limits)")
    if P.shape[1] == 0:
        return np.ones(P.shape[0])
    if method == "bound":
        return np.maximum(0.0, 1.0 - np.sum(1.0 - P, axis=1))
    if method == "independent":
        return np.prod(P, axis=1)
    raise ValueError(f"unknown joint method {method!r}; use 'bound' or 'independent'")


def _mean_sd(model, U, with_noise: bool):
    """(mean, sd, mean_all, sd_all, leaning) from a fitted model at U, or from a posterior over
    fixed points (U None); the last three are None unless the model has the single-run check."""
    if U is None:
        if hasattr(model, "mean_sd_parts"):
            return model.mean_sd_parts(include_noise=with_noise)
        return (*model.mean_sd(include_noise=with_noise), None, None, None)
    if hasattr(model, "predict_parts"):
        return model.predict_parts(U, include_noise=with_noise)
    return (*model.predict(U, include_noise=with_noise), None, None, None)


def _predicted_together(limits, models, U) -> dict:
    """``{k: (mean, sd, mean_all, sd_all, leaning)}`` of the models at U that predict in one go with others
    of their kind (a model class's ``predict_parts_together``: the same numbers, fewer calls)."""
    if U is None:
        return {}
    groups: dict = {}
    for k, model in enumerate(models):
        together = getattr(type(model), "predict_parts_together", None) if model is not None else None
        if together is not None:
            groups.setdefault(together, []).append(k)
    out = {}
    for together, ks in groups.items():
        if len(ks) > 1:
            answers = together([models[k] for k in ks], U, [limits[k].with_noise for k in ks])
            out.update(zip(ks, answers))
    return out


def limit_predictions(limits: Sequence[LimitRule], models, U=None, *, unavailable=None) -> list[LimitPrediction]:
    """What each limit's model says at the points, as the screen judges it.

    Parameters
    ----------
    limits : sequence of LimitRule
    models : sequence (one per limit) of model or None
        A fitted model (``predict(U, include_noise=...)``; the limit-model
        guards, the short model and the leave-one-out widening, are already
        part of it) or, with ``U`` None, a posterior over fixed points
        (``mean_sd(include_noise=...)``). None: the limit cannot vouch.
    U : array of shape (n, k), optional
        Points in the models' unit-scaled coordinates.
    unavailable : sequence of (status, message), optional
        Why each limit without a model cannot vouch ("too-few-runs" or
        "model-not-fitted"); default "model-not-fitted".

    Returns
    -------
    list of LimitPrediction
        The predictive distribution of the next measurement (latent plus
        noise) or of the true value, as each limit is judged.
    """
    together = _predicted_together(limits, models, U)
    out = []
    for k, (lim, model) in enumerate(zip(limits, models)):
        if model is None:
            status, message = (unavailable[k] if unavailable is not None
                               else ("model-not-fitted", "no model"))
            out.append(LimitPrediction(lim.name, lim.probability, lim.lower, lim.upper,
                                       status=status, message=message))
        else:
            mean, sd, mean_all, sd_all, leaning = (together[k] if k in together
                                                   else _mean_sd(model, U, lim.with_noise))
            basis = _monotone_basis(lim, model, U) if lim.monotone else None
            out.append(LimitPrediction(lim.name, lim.probability, lim.lower, lim.upper, mean=mean, sd=sd,
                                       mean_all=mean_all, sd_all=sd_all, leaning=leaning, scale=lim.scale,
                                       monotone=basis))
    return out


def _monotone_basis(lim: LimitRule, model, U) -> MonotoneBasis:
    """A monotone limit's anchors: the model's runs and the rule's lattice, their probabilities,
    and which runs broke the limit (the lattice is predicted by the model fitted to real data)."""
    anchors, a_mean, a_sd, measured, subjects = model.runs_view()
    broke = ~within_limit(measured, lim) & (subjects >= lim.broken_after)
    if lim.lattice is not None and lim.lattice.shape[0]:
        g_mean, g_sd = model.lattice_prediction(lim.lattice)
        anchors = np.vstack([anchors, lim.lattice])
        a_mean, a_sd = np.concatenate([a_mean, g_mean]), np.concatenate([a_sd, g_sd])
        broke = np.concatenate([broke, np.zeros(lim.lattice.shape[0], dtype=bool)])
    a_p = limit_probability(a_mean, a_sd, lower=lim.lower, upper=lim.upper, scale=lim.scale)
    points = model.points if U is None else np.asarray(U, dtype=float)
    return MonotoneBasis(points, anchors, a_p, broke)


def probabilities_at(predictions: Sequence[LimitPrediction], n: int) -> tuple[np.ndarray, np.ndarray]:
    """Per-limit probabilities and whether every limit could vouch.

    Returns
    -------
    P : array of shape (n, n_limits)
        NaN in the column of a limit that cannot vouch.
    vouch : bool array of shape (n,)
        False everywhere when some limit cannot vouch (fail closed).
    """
    P = np.full((n, len(predictions)), np.nan)
    vouch = np.ones(n, dtype=bool)
    for j, lim in enumerate(predictions):
        if lim.status == "ok":
            p = lim.p_met()
            P[:, j] = p if lim.monotone is None else monotone_envelope(p, lim.monotone)
        else:
            vouch[:] = False
    return P, vouch


def figures_at(predictions: Sequence[LimitPrediction], n: int, *,
               method: str = "bound") -> tuple[np.ndarray, np.ndarray]:
    """Per-limit probabilities (NaN where a limit cannot vouch) and the joint figure
    (0 where a limit cannot vouch: fail closed) at n points."""
    P, vouch = probabilities_at(predictions, n)
    filled = P if np.isfinite(P).all() else np.nan_to_num(P, nan=0.0)  # nan_to_num changes no finite value
    return P, np.where(vouch, joint_figure(filled, method=method), 0.0)


def joint_at(predictions: Sequence[LimitPrediction], n: int, *, method: str = "bound") -> np.ndarray:
    """The joint figure at n points; 0 where a limit cannot vouch (fail closed)."""
    return figures_at(predictions, n, method=method)[1]


def forbidden_mask(regions: Sequence[ForbiddenRegion], X) -> tuple[np.ndarray, list[str]]:
    """Which points lie in a forbidden region, and which region (the first that holds them)."""
    X = np.asarray(X, dtype=float)
    n = X.shape[0]
    mask = np.zeros(n, dtype=bool)
    detail = [""] * n
    for region in regions:
        inside = np.all(X @ region.A.T <= region.b + REGION_TOL, axis=1)
        for i in np.flatnonzero(inside & ~mask):
            detail[i] = region.describe()
        mask |= inside
    return mask, detail


class Texts(Sequence):
    """One sentence per candidate, each written when it is first read.

    A step screens thousands of candidates several times (the pool, the
    refined pool, each threshold of the price) and reads the sentences of
    one screen only; writing each on first use saves most of that work and
    gives the same text. A copy or a pickle is a plain list.
    """

    def __init__(self, n: int):
        self._make = np.full(n, None, dtype=object)
        self._text: dict[int, str] = {}

    def set(self, idx, make) -> None:
        """The sentence of each candidate i in ``idx`` (an index or an index array) is ``make(i)``;
        set before the first read."""
        self._make[idx] = make

    def __len__(self) -> int:
        return len(self._make)

    def __getitem__(self, i):
        if isinstance(i, slice):
            return [self[j] for j in range(*i.indices(len(self)))]
        i = range(len(self))[i]  # negative indices, and IndexError when out of range
        if i not in self._text:
            make = self._make[i]
            self._text[i] = "" if make is None else make(i)  # i a plain int
        return self._text[i]

    def __eq__(self, other) -> bool:
        return isinstance(other, Sequence) and list(self) == list(other)

    def __repr__(self) -> str:
        return repr(list(self))

    def __reduce__(self):
        return list, (list(self),)


@dataclass(frozen=True)
class HardRules:
    """The rules that need no model, at a set of points (see :func:`hard_rules`)."""

    inside: np.ndarray
    outside_detail: list[str]
    forbidden: np.ndarray
    forbidden_detail: list[str]
    step: np.ndarray
    step_basis: str
    beyond: np.ndarray | None = None
    beyond_detail: list[str] | None = None
    skips: np.ndarray | None = None
    skips_detail: list[str] | None = None


def skipped_levels(ladders, U, anchors) -> tuple[np.ndarray, list[str]]:
    """Which points skip an untried level (see rule 3c), and how, from the anchors (unit-scaled)."""
    n = U.shape[0]
    out, detail = np.zeros(n, dtype=bool), [""] * n
    if not ladders or anchors.shape[0] == 0:
        return out, detail
    rises = np.zeros((n, len(ladders)), dtype=int)
    for q, lad in enumerate(ladders):
        rises[:, q] = lad.index(U[:, lad.column]) - int(np.max(lad.index(anchors[:, lad.column])))
    too_high = np.any(rises > 1, axis=1)
    several = np.sum(rises > 0, axis=1) > 1
    out = too_high | several
    for i in np.flatnonzero(out):
        if too_high[i]:
            q = int(np.argmax(rises[i]))
            lad = ladders[q]
            top = lad.levels[int(np.max(lad.index(anchors[:, lad.column])))]
            detail[i] = (f"{lad.name} would rise {rises[i, q]} levels above {top:g}, the highest level given "
                         "in a run that met every limit (one level at a time)")
        else:
            names = [ladders[q].name for q in np.flatnonzero(rises[i] > 0)]
            detail[i] = (f"{' and '.join(names)} would {'both' if len(names) == 2 else 'all'} rise above their "
                         "highest levels at once (one factor at a time)")
    return out, detail


def _beyond_span(U, anchors, reach, floor, basis, columns=None):
    n = U.shape[0]
    cols = np.ones(U.shape[1], dtype=bool) if columns is None else np.asarray(columns, dtype=bool)
    if reach is None or anchors.shape[0] == 0 or not np.any(cols):
        return np.zeros(n, dtype=bool), [""] * n
    lo, hi = tested_span(anchors, reach, floor)
    lo, hi = np.where(cols, lo, -np.inf), np.where(cols, hi, np.inf)
    out = np.any((U < lo - 1e-12) | (U > hi + 1e-12), axis=1)

    def text(i):
        j = int(np.argmax(np.maximum(lo - U[i], U[i] - hi)))
        return (f"free factor {j + 1} at {U[i, j]:.3f} (unit-scaled) lies outside the span of the "
                f"{basis.replace('run', 'runs', 1)} [{lo[j]:.3f}, {hi[j]:.3f}] (span_reach {reach:g})")

    detail = Texts(n)
    detail.set(out, text)
    return out, detail


def hard_rules(rules: ScreenRules, space, X, U, anchors, *, step_basis: str, span_columns=None) -> HardRules:
    """Outside the design space, inside a forbidden region, and the step from the anchors.

    Parameters
    ----------
    rules : ScreenRules
    space : design space
        ``contains(X)`` and ``describe_violation(x)``.
    X : array of shape (n, n_factors)
        Points in protocol units.
    U : array of shape (n, k)
        The same points in unit-scaled coordinates of the free factors.
    anchors : array of shape (m, k)
        The runs the step is measured from (unit-scaled).
    step_basis : str
        What the anchors are, for the messages.
    span_columns : bool array of shape (k,), optional
        The columns of U the tested-span rule applies to (default all; a
        factor with discrete levels steps level by level under ``max_step``).
    """
    inside = np.asarray(space.contains(X))
    outside_detail = [""] * len(inside)
    for i in np.flatnonzero(~inside):
        outside_detail[i] = space.describe_violation(np.asarray(X)[i])
    forb, forb_detail = forbidden_mask(rules.forbidden, X)
    beyond, beyond_detail = _beyond_span(np.asarray(U, float), np.asarray(anchors, float), rules.span_reach,
                                         rules.span_floor, step_basis, span_columns)
    skips, skips_detail = skipped_levels(rules.ladders, np.asarray(U, float), np.asarray(anchors, float))
    return HardRules(inside, outside_detail, forb, forb_detail, step_distance(U, anchors), step_basis,
                     beyond, beyond_detail, skips, skips_detail)


def screen_points(rules: ScreenRules, hard: HardRules, predictions: Sequence[LimitPrediction]) -> ScreenResult:
    """The whole screen at points whose hard rules are known (see :func:`run_screen`)."""
    return run_screen(
        inside=hard.inside,
        outside_detail=hard.outside_detail,
        forbidden=hard.forbidden,
        forbidden_detail=hard.forbidden_detail,
        step=hard.step,
        max_step=rules.max_step,
        step_basis=hard.step_basis,
        beyond=hard.beyond,
        beyond_detail=hard.beyond_detail,
        skips=hard.skips,
        skips_detail=hard.skips_detail,
        limits=list(predictions),
        threshold=rules.threshold,
        joint=rules.joint,
    )


def step_distance(U, U_safe) -> np.ndarray:
    """Distance from each candidate to the nearest safe run, per sqrt(factor).

    Parameters
    ----------
    U : array of shape (n_candidates, k)
        Candidates in unit-scaled coordinates of the free factors.
    U_safe : array of shape (n_safe, k)

    Returns
    -------
    ndarray of shape (n_candidates,); inf when there is no safe run.
    """
    U = np.asarray(U, dtype=float)
    U_safe = np.asarray(U_safe, dtype=float)
    if U_safe.shape[0] == 0:
        return np.full(U.shape[0], np.inf)
    k = max(U.shape[1], 1)
    best = np.full(U.shape[0], np.inf)
    for start in range(0, U_safe.shape[0], 256):
        block = U_safe[start : start + 256]
        d2 = (
            np.einsum("ij,ij->i", U, U)[:, None]
            - 2.0 * U @ block.T
            + np.einsum("ij,ij->i", block, block)[None, :]
        )
        best = np.minimum(best, np.min(d2, axis=1))
    return np.sqrt(np.maximum(best, 0.0) / k)


@dataclass(frozen=True)
class ScreenResult:
    """Outcome of the screen for every candidate.

    Attributes
    ----------
    survives : bool array (n,)
    reason : array of str (n,)
        "" for survivors, else one of :data:`REASONS`.
    detail : sequence of str (n,)
        A plain sentence for each excluded candidate (:class:`Texts`).
    P : array (n, n_limits)
        Per-limit probabilities (NaN where the limit could not vouch).
    joint : array (n,)
        Joint figure (0 where a limit could not vouch).
    step : array (n,)
        Distance to the nearest safe run (inf when there is none).
    limit_names : tuple of str
    messages : tuple of str
        Screen-wide notes (e.g. a limit that excludes everything).
    """

    survives: np.ndarray
    reason: np.ndarray
    detail: Sequence[str]
    P: np.ndarray
    joint: np.ndarray
    step: np.ndarray
    limit_names: tuple[str, ...]
    messages: tuple[str, ...] = field(default=())

    @property
    def n(self) -> int:
        return int(self.survives.shape[0])

    def counts(self) -> dict[str, int]:
        """Number of candidates per outcome ("survived" and each reason)."""
        out = {"survived": int(self.survives.sum())}
        for r in REASONS:
            out[r] = int(np.sum(self.reason == r))
        return out


def _with_every_run(limits: Sequence[LimitPrediction]) -> list[LimitPrediction]:
    """The predictions with every run counted (the mean and sd before the single-run check)."""
    return [replace(lim, mean=lim.mean if lim.mean_all is None else lim.mean_all, sd=lim.sd_all)
            if lim.status == "ok" and lim.sd_all is not None else lim for lim in limits]


def _one_run_detail(i, limits, P, P_all, J, threshold) -> str:
    """Why candidate i fails only without one run: the limit, both figures and the run."""
    worst = max(range(len(limits)), key=lambda j: (P_all[i, j] - P[i, j]) if limits[j].status == "ok" else -1.0)
    lim = limits[worst]
    run = lim.leaning[i] if lim.leaning is not None and lim.leaning[i] else "one run"
    return (f"limit {lim.name!r}: probability {P_all[i, worst]:.3f} with every run, {P[i, worst]:.3f} "
            f"without run {run} (joint {J[i]:.3f}, threshold {threshold:g}); no claim may rest on a "
            "single run: another run near this one would settle it")


def run_screen(
    *,
    inside: np.ndarray,
    outside_detail: list[str] | None = None,
    forbidden: np.ndarray | None = None,
    forbidden_detail: list[str] | None = None,
    step: np.ndarray | None = None,
    max_step: float | None = None,
    step_basis: str = "run that met every limit",
    beyond: np.ndarray | None = None,
    beyond_detail: list[str] | None = None,
    skips: np.ndarray | None = None,
    skips_detail: list[str] | None = None,
    limits: list[LimitPrediction],
    threshold: float,
    joint: str = "bound",
) -> ScreenResult:
    """Screen candidates.

    Parameters
    ----------
    inside : bool array (n,)
        Whether each candidate lies inside the design space.
    outside_detail : list of str, optional
        The violated constraint for each candidate outside.
    forbidden : bool array (n,), optional
        Whether each candidate lies in a forbidden region.
    forbidden_detail : list of str, optional
    step : array (n,), optional
        Distance to the nearest run that met every limit (see :func:`step_distance`).
    max_step : float, optional
        The protocol's largest step; None turns the rule off.
    step_basis : str
        What ``step`` was measured from, for the messages.
    beyond : bool array (n,), optional
        Whether each candidate lies beyond the tested span (see :func:`guardband.safety.span.tested_span`).
    beyond_detail : list of str, optional
    skips : bool array (n,), optional
        Whether each candidate skips an untried level (see :func:`skipped_levels`).
    skips_detail : list of str, optional
    limits : list of LimitPrediction
    threshold : float
        The joint figure a candidate must reach.
    joint : {"bound", "independent"}
    """
    inside = np.asarray(inside, dtype=bool)
    n = inside.shape[0]
    P, J = figures_at(limits, n, method=joint)
    messages = [f"limit {lim.name!r} cannot vouch for any candidate: {lim.message}"
                for lim in limits if lim.status != "ok"]
    if step is None:
        step = np.full(n, np.nan)
    reason = np.full(n, "", dtype=object)
    detail = Texts(n)  # each sentence written when read

    def mark(mask, code, text_of):
        idx = np.flatnonzero(mask & (reason == ""))
        reason[idx] = code
        detail.set(idx, text_of)

    mark(~inside, "outside-design-space",
         lambda i: (outside_detail[i] if outside_detail else "outside the design space"))
    if forbidden is not None:
        mark(np.asarray(forbidden, dtype=bool), "forbidden-region",
             lambda i: (forbidden_detail[i] if forbidden_detail else "inside a forbidden region"))
    if max_step is not None:
        too_far = ~(np.asarray(step) <= max_step)
        mark(too_far, "step-too-large",
             lambda i: (f"step {step[i]:.3f} from the nearest {step_basis} exceeds max_step {max_step:g}"
                        if np.isfinite(step[i])
                        else f"no step can be measured: there is no {step_basis} yet"))
    if beyond is not None:
        mark(np.asarray(beyond, dtype=bool), "beyond-tested-span",
             lambda i: beyond_detail[i] if beyond_detail else "beyond the span of the tested runs")
    if skips is not None:
        mark(np.asarray(skips, dtype=bool), "skips-untried-level",
             lambda i: skips_detail[i] if skips_detail else "skips an untried level")
    for lim in limits:
        if lim.status != "ok":
            mark(np.ones(n, dtype=bool), lim.status,
                 lambda i, lim=lim: f"limit {lim.name!r}: {lim.message}")
    for lim in limits:
        if lim.status == "ok" and lim.monotone is not None:
            mark(above_broken(lim.monotone), "above-broken-cohort",
                 lambda i, lim=lim: (f"limit {lim.name!r}: every free factor is at or above a run that broke "
                                     "the limit (the rate is held not to fall as a dose rises)"))
    # with every run counted first: a candidate that fails only because one
    # run carries its claim gets its own reason, naming that run
    P_all, J_all = figures_at(_with_every_run(limits), n, method=joint)
    for j, lim in enumerate(limits):
        if lim.status == "ok":
            mark(P_all[:, j] < lim.probability, "limit-probability",
                 lambda i, j=j, lim=lim: (f"limit {lim.name!r}: probability {_fmt_p(P[i, j], lim.probability)} "
                                          f"is below the required {lim.probability:g}"))
    mark(J_all < threshold, "joint-below-threshold",
         lambda i: f"joint figure ({joint}) {_fmt_p(J[i], threshold)} is below the threshold {threshold:g}")
    one_run = (J < threshold) | np.any(P < np.array([lim.probability for lim in limits]), axis=1)
    mark(one_run, "rests-on-one-run", lambda i: _one_run_detail(i, limits, P, P_all, J, threshold))
    survives = reason == ""
    return ScreenResult(
        survives=survives,
        reason=reason.astype(str),
        detail=detail,
        P=P,
        joint=J,
        step=np.asarray(step, dtype=float),
        limit_names=tuple(lim.name for lim in limits),
        messages=tuple(messages),
    )
