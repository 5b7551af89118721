"""The screen's rules as small objects, built once from the protocol, and which runs met every limit.

Everything the screen needs to know about a protocol lives here as plain
numbers: each limit's bounds, the probability it must hold with and whether
it is judged on the next measurement or on the true value; each forbidden
region's rows ``A x <= b``; the threshold, the joint method and the largest
step. The planner, the report, the review and the simulator all build one
:class:`ScreenRules` and call the functions of :mod:`guardband.safety`, so
they cannot disagree.

The builder reads a protocol object by its attributes; this package does not
import the planner.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["LimitRule", "ForbiddenRegion", "ScreenRules", "LevelLadder", "level_ladders", "limit_rules", "within_limit", "meets_limits",
           "met_every_limit"]

#: Judged on the next measurement (noise included) or on the true value.
MEASUREMENT = "measurement"
TRUE_VALUE = "true-value"
#: How reports and messages say what a limit's probability is about, by ``judged_on``.
JUDGED_TEXT = {
    MEASUREMENT: "a new measurement",
    TRUE_VALUE: "the response's true value (the noise-free mean, measurement noise left out)",
}


#: Values per continuous factor in a monotone limit's dominance lattice, and
#: the most lattice points in all (fewer values per factor beyond it).
LATTICE_VALUES = 11
LATTICE_MAX_POINTS = 4096


@dataclass(frozen=True)
class LimitRule:
    """One limit: ``lower <= response <= upper`` with at least ``probability``."""

    name: str
    lower: float | None
    upper: float | None
    probability: float
    judged_on: str = MEASUREMENT
    binomial: bool = False
    monotone: bool = False
    #: A monotone limit's fixed lattice (unit-scaled free factors): every
    #: combination of the discrete levels, and LATTICE_VALUES evenly spaced
    #: values of each continuous factor. A point is never judged safer than
    #: the lattice points at or below it, so its figure does not depend on
    #: which other points are judged with it (all of them, for discrete doses).
    lattice: np.ndarray | None = field(default=None, compare=False, repr=False)
    #: A dose counts as having broken a monotone limit once this many subjects were treated there.
    broken_after: int = 1

    @property
    def with_noise(self) -> bool:
        """Whether the limit is judged on the next measurement (noise included)."""
        return self.judged_on == MEASUREMENT and not self.binomial

    @property
    def scale(self) -> str:
        """Where the limit model's mean and sd live: "response", or "logit" (of a binomial rate)."""
        return "logit" if self.binomial else "response"

    @property
    def judged_text(self) -> str:
        """What the limit's probability is about, in words: "a new measurement" or "the true value ..."."""
        return JUDGED_TEXT[self.judged_on]

    @property
    def prior_mean(self) -> float:
        """Where a limit model's prior mean sits: at the limit.

        Away from the runs such a model gives a probability of about 1/2 at
        best and never claims safety. For a two-sided limit the upper edge is
        used (the same 1/2 ceiling holds). A binomial limit's model is on the
        logit of the rate, so its prior mean is the logit of the limit.
        """
        edge = float(self.upper if self.upper is not None else self.lower)
        return float(np.log(edge / (1.0 - edge))) if self.binomial else edge


@dataclass(frozen=True)
class ForbiddenRegion:
    """A region the protocol forbids: the points with ``A x <= b`` (every rule at once)."""

    name: str
    rules: tuple[str, ...]
    A: np.ndarray
    b: np.ndarray

    def describe(self) -> str:
        return f"inside the forbidden region {self.name!r} ({'; '.join(self.rules)})"


@dataclass(frozen=True)
class LevelLadder:
    """One discrete factor's levels, for the no-skipping rule: its column among the free factors."""

    name: str
    column: int
    levels: np.ndarray  # in protocol units
    units: np.ndarray  # the same, unit-scaled

    def index(self, u) -> np.ndarray:
        """The level index nearest each unit-scaled value."""
        return np.argmin(np.abs(np.asarray(u, float)[:, None] - self.units[None, :]), axis=1)


def level_ladders(protocol) -> tuple[LevelLadder, ...]:
    """The discrete free factors' ladders when the protocol forbids skipping untried levels, else ()."""
    esc = getattr(protocol, "escalation", None)
    if esc is None or not esc.no_skipping:
        return ()
    space = protocol.design_space()
    free = np.asarray(space.free, dtype=bool)
    column = np.cumsum(free) - 1
    centre = np.array([0.5 * (f.low + f.high) for f in protocol.factors])
    out = []
    for j, f in enumerate(protocol.factors):
        if f.kind != "discrete" or not free[j]:
            continue
        levels = np.asarray(f.levels, dtype=float)
        X = np.tile(centre, (levels.size, 1))
        X[:, j] = levels
        out.append(LevelLadder(f.name, int(column[j]), levels, np.asarray(space.to_unit(X))[:, j]))
    return tuple(out)


@dataclass(frozen=True)
class ScreenRules:
    """Every rule of the screen, from one protocol."""

    limits: tuple[LimitRule, ...]
    forbidden: tuple[ForbiddenRegion, ...]
    threshold: float
    joint: str
    max_step: float | None
    span_reach: float | None = None
    span_floor: float = 0.0
    ladders: tuple[LevelLadder, ...] = ()

    @classmethod
    def from_protocol(cls, protocol) -> ScreenRules:
        """Build the rules of ``protocol`` (a validated protocol object)."""
        limits = limit_rules(protocol)
        regions = []
        for region in protocol.screen.forbidden:
            # normalised as the design space's rows are, so that the screen's
            # slack on A x - b means the same at any scale of factors and rules
            A, b = protocol.design_space().normalise_rows(*protocol.rule_rows(region.parsed)[:2])
            regions.append(ForbiddenRegion(region.name, tuple(region.rules), A, b))
        s = protocol.screen
        return cls(limits, tuple(regions), float(s.threshold), s.joint, s.max_step,
                   s.span_reach, float(s.span_floor), level_ladders(protocol))


def limit_rules(protocol) -> tuple[LimitRule, ...]:
    """The limits of ``protocol`` as :class:`LimitRule` objects."""
    out = []
    for lim in protocol.limits:
        monotone = bool(protocol.monotone_for(lim))
        out.append(LimitRule(lim.name, lim.lower, lim.upper, float(lim.probability), lim.judged_on,
                             lim.kind == "binomial", monotone, dominance_lattice(protocol) if monotone else None,
                             int(getattr(lim, "broken_after", None) or 1)))
    return tuple(out)


def dominance_lattice(protocol) -> np.ndarray:
    """The lattice of a monotone limit (see :attr:`LimitRule.lattice`), unit-scaled free factors."""
    factors = protocol.factors
    n_cont = sum(1 for f in factors if f.kind != "discrete" and f.high > f.low)
    per = LATTICE_VALUES
    n_disc = int(np.prod([len(f.levels) for f in factors if f.kind == "discrete"]))
    while n_cont and per > 2 and n_disc * per**n_cont > LATTICE_MAX_POINTS:
        per -= 1
    axes = [np.asarray(f.levels, float) if f.kind == "discrete" else np.linspace(f.low, f.high, per)
            for f in factors]
    X = np.stack([a.ravel() for a in np.meshgrid(*axes, indexing="ij")], axis=1)
    space = protocol.design_space()
    return np.ascontiguousarray(np.asarray(space.to_unit(X))[:, np.asarray(space.free, dtype=bool)])


def within_limit(y, limit: LimitRule) -> np.ndarray:
    """Whether values meet one limit (NaN counts as not met)."""
    y = np.asarray(y, dtype=float)
    ok = np.isfinite(y)
    if limit.upper is not None:
        ok &= y <= limit.upper
    if limit.lower is not None:
        ok &= y >= limit.lower
    return ok


def meets_limits(limits, Y, n: int, *, margin: float = 0.0) -> np.ndarray:
    """Which runs met every limit.

    Parameters
    ----------
    limits : sequence of LimitRule
    Y : mapping of response name to array of shape (n,)
        Measured or true values; a missing (NaN) value counts as not met.
    n : int
        Number of runs (needed when there is no limit).
    margin : float
        Required distance inside each limit, in the response's units.

    Returns
    -------
    bool ndarray of shape (n,)
    """
    ok = np.ones(n, dtype=bool)
    for lim in limits:
        y = np.asarray(Y[lim.name], dtype=float)
        if margin:
            lim = LimitRule(lim.name, None if lim.lower is None else lim.lower + margin,
                            None if lim.upper is None else lim.upper - margin, lim.probability, lim.judged_on,
                            lim.binomial, lim.monotone, lim.lattice, lim.broken_after)
        ok &= within_limit(y, lim)
    return ok


def met_every_limit(protocol, Y, *, margin: float = 0.0) -> np.ndarray:
    """Which runs met every limit of ``protocol`` (see :func:`meets_limits`); ``Y`` holds the objective too."""
    n = len(np.asarray(Y[protocol.objective.name]))
    return meets_limits(limit_rules(protocol), Y, n, margin=margin)
