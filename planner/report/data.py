"""The geometry of the report's slices and maps, and the model predictions along them.

:class:`_Geometry` knows which factors can move, how a mixture keeps its
total when a component moves and where a slice leaves the design space; the
screen's figures come from the safety package through it
(:meth:`PlanResult.limit_figures`, :func:`guardband.safety.screen.forbidden_mask`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from guardband.planner.errors import ProtocolError
from guardband.planner.models.binomial import rate_band
from guardband.planner.step.rates import objective_band, objective_scale
from guardband.planner.settings import FEASIBILITY_TOL, Z95
from guardband.planner.step import PlanResult
from guardband.safety.limits import ScreenRules
from guardband.safety.screen import forbidden_mask

__all__ = ["SliceData", "MapData", "JudgedRecipe", "slice_data", "map_data", "default_map_factors", "check_map_factors",
           "check_factor_names", "slice_at", "map_at", "SLICE_POINTS", "MAP_POINTS"]

#: Points along a slice of a continuous factor, and per axis of the map.
SLICE_POINTS = 61
MAP_POINTS = 61
#: A component within this share of its range from a bound counts as on the bound.
BOUND_TOL = 1e-6
#: A constraint row whose slope along a slice is smaller than this does not limit it.
_SLOPE_TOL = 1e-15


@dataclass(frozen=True)
class SliceData:
    """A one-factor slice through a point, with every model's prediction.

    Attributes
    ----------
    factor : int
        Index of the factor that moves.
    t : array of shape (n,)
        Its values along the slice.
    X : array of shape (n, n_factors)
        The points, in protocol units (inside the design space).
    mean, sd : dict of str to array of shape (n,)
        Per response; None where the response has no model. The objective
        is the latent response; a limit is a new measurement (noise
        included) or its true value, as the screen uses it; a binomial
        limit is the latent logit of its rate (see :meth:`band`).
    discrete : bool
    mixture : bool
        True when the other components move in proportion to keep the total.
    rates : frozenset of str
        The binomial responses, shown as rates.
    """

    factor: int
    t: np.ndarray
    X: np.ndarray
    mean: dict
    sd: dict
    discrete: bool
    mixture: bool
    rates: frozenset = frozenset()

    def band(self, name: str):
        """(centre, lower, upper) of the 95% interval of a response along the slice, in its own units.

        A binomial response is shown as its rate: the median and the 95%
        interval of the true rate, all inside [0, 1].
        """
        mean, sd = self.mean[name], self.sd[name]
        if name in self.rates:
            return rate_band(mean, sd, Z95)
        return mean, mean - Z95 * sd, mean + Z95 * sd


@dataclass(frozen=True)
class MapData:
    """The joint figure and the objective over two factors.

    Attributes
    ----------
    factors : (int, int)
        Indices of the x and y factors.
    gx, gy : arrays of shape (nx,), (ny,)
        Grid values of each factor.
    X : array of shape (ny, nx, n_factors)
        The points, in protocol units.
    inside : bool array of shape (ny, nx)
        Whether each point lies in the design space.
    forbidden : bool array of shape (ny, nx)
    joint, objective : arrays of shape (ny, nx)
        NaN outside the design space.
    """

    factors: tuple[int, int]
    gx: np.ndarray
    gy: np.ndarray
    X: np.ndarray
    inside: np.ndarray
    forbidden: np.ndarray
    joint: np.ndarray
    objective: np.ndarray


@dataclass(frozen=True)
class JudgedRecipe:
    """A chemist's own recipe judged by ``guardband judge``, to be shown on the report's figures.

    Attributes
    ----------
    name : str
    x : array of shape (n_factors,)
        As given (protocol units).
    passes : bool
        The judge's verdict.
    record : int or None
        The index of the ``judge`` record it comes from.
    """

    name: str
    x: np.ndarray
    passes: bool
    record: int | None = None


class _Geometry:
    """Which factors move, how a mixture keeps its total, and the models."""

    def __init__(self, result: PlanResult):
        self.result = result
        self.protocol = p = result.protocol
        self.space = space = result.space
        chk = space.check()
        self.ranges = np.asarray(chk.ranges)
        self.centre = np.asarray(chk.centre)
        self.free = np.asarray(space.free, dtype=bool)
        self.d = len(p.factors)
        self.levels = {int(j): np.asarray(lv, dtype=float) for j, lv in space.levels.items()}
        self.component = np.array([f.kind == "component" for f in p.factors])
        self.total = float(p.mixture.total) if p.mixture is not None else None
        self.free_idx = np.flatnonzero(self.free)
        self.rules = ScreenRules.from_protocol(p)

    def feasible_levels(self, j: int) -> np.ndarray:
        lv = self.levels[j]
        tol = FEASIBILITY_TOL * float(self.space.factor_scale[j])
        lo, hi = self.ranges[j]
        return lv[(lv >= lo - tol) & (lv <= hi + tol)]

    def move(self, x0: np.ndarray, values: dict[int, np.ndarray]) -> np.ndarray:
        """Points that take ``values`` for some factors and x0 for the rest.

        When a moved factor is a mixture component, the other free
        components (see :meth:`adjusted`) are scaled in proportion so that
        the total holds: x_k = x0_k (total - fixed - moved) / rest, where
        ``rest`` is their sum at x0 and ``fixed`` the sum of the components
        that stay.
        """
        n = len(next(iter(values.values())))
        X = np.repeat(np.asarray(x0, dtype=float)[None, :], n, axis=0)
        for k, v in values.items():
            X[:, k] = v
        moved = [k for k in values if self.component[k]]
        if moved and self.total is not None:
            others = self.adjusted(x0, values)
            fixed = sum(float(x0[k]) for k in np.flatnonzero(self.component)
                        if k not in others and k not in values)
            remaining = self.total - fixed - X[:, moved].sum(axis=1)
            rest = float(np.sum(x0[others])) if others else 0.0
            if others and rest > 0:
                X[:, others] = x0[others][None, :] * (remaining / rest)[:, None]
            elif others:
                X[:, others] = (remaining / len(others))[:, None]
        return X

    def adjusted(self, x0: np.ndarray, moved) -> list[int]:
        """The components that keep the total when ``moved`` change.

        The free components that are not moved, less those that sit on one
        of their bounds at x0: scaling those would leave the design space at
        once (a proposal often sits on a bound), so they stay where they
        are. When every one of them sits on a bound, all of them adjust.
        """
        others = [int(k) for k in np.flatnonzero(self.component & self.free) if k not in moved]
        span = np.maximum(self.ranges[:, 1] - self.ranges[:, 0], 1.0e-300)
        lo, hi = self.space.lower, self.space.upper
        inner = [k for k in others
                 if min(x0[k] - lo[k], hi[k] - x0[k]) > BOUND_TOL * span[k]]
        return inner or others

    def moves_in_proportion(self, factors: Sequence[int]) -> bool:
        return self.total is not None and any(self.component[k] for k in factors)

    def can_move(self, factors: Sequence[int]) -> bool:
        """False when moving these factors is impossible (mixture: nothing left to adjust)."""
        if not self.moves_in_proportion(factors):
            return True
        others = [k for k in np.flatnonzero(self.component & self.free) if k not in factors]
        return bool(others)

    def segment(self, x0: np.ndarray, j: int) -> tuple[float, float]:
        """Range of factor j along its slice through x0 (the path is a line)."""
        X = self.move(x0, {j: np.array([0.0, 1.0])})
        base, D = X[0], X[1] - X[0]
        s = self.space
        # g t <= h for every bound and inequality row, with x(t) = base + t D
        # (bounds rows divided by each factor's span, as the space's own rows are,
        # so that the slope tolerance means the same at any scale)
        span = s.factor_scale
        rows = [(-D / span, (base - s.lower) / span), (D / span, (s.upper - base) / span)]
        if s.A_ub.shape[0]:
            rows.append((s.A_ub @ D, s.b_ub - s.A_ub @ base))
        lo, hi = -np.inf, np.inf
        for g, h in rows:
            pos, neg = g > _SLOPE_TOL, g < -_SLOPE_TOL
            if np.any(pos):
                hi = min(hi, float(np.min(h[pos] / g[pos])))
            if np.any(neg):
                lo = max(lo, float(np.max(h[neg] / g[neg])))
        lo = max(lo, self.ranges[j, 0])
        hi = min(hi, self.ranges[j, 1])
        if lo > hi:  # x0 sits on an edge within the tolerance
            lo = hi = float(x0[j])
        return lo, hi

    def forbidden(self, X: np.ndarray) -> np.ndarray:
        return forbidden_mask(self.rules.forbidden, X)[0]

    def predict(self, name: str, X: np.ndarray):
        """(mean, sd) of one response at X, or (None, None) when it has no model.

        A limit is predicted as the screen judges it: the next measurement,
        or the true value.
        """
        model = self.result.fitted.get(name)
        if model is None or X.shape[0] == 0:
            return None, None
        rule = self.limit_rule(name)
        return model.predict(self.result.unit(X), include_noise=rule is not None and rule.with_noise)

    def predicted_centre(self, name: str, X: np.ndarray):
        """A response's predicted centre at X in its own units (a binomial rate: its median), or None."""
        mean, sd = self.predict(name, X)
        if mean is None:
            return None
        rule = self.limit_rule(name)
        return rate_band(mean, sd, Z95)[0] if rule is not None and rule.binomial else mean

    def limit_rule(self, name: str):
        """The screen's rule for the limit on response ``name``, or None (the objective)."""
        return next((r for r in self.rules.limits if r.name == name), None)

    def joint(self, X: np.ndarray) -> np.ndarray:
        """The screen's joint figure at X (0 where a limit has no model: fail closed)."""
        return self.result.limit_figures(X)[1]


def slice_data(result: PlanResult, x0, factor: int | str, *, n: int = SLICE_POINTS) -> SliceData:
    """A one-factor slice of every model through the point x0.

    Parameters
    ----------
    result : PlanResult
        With its fitted models and design space.
    x0 : array of shape (n_factors,)
        The point, in protocol units.
    factor : int or str
        The factor that moves. A continuous factor moves over its range
        along the slice (``n`` points plus x0 itself); a discrete factor
        takes its levels. A mixture component moves against the other free
        components, which keep their proportions, so the total holds
        (components on a bound at x0 stay where they are).
    n : int

    Returns
    -------
    SliceData
        Only points inside the design space are kept.
    """
    geo = _Geometry(result)
    return slice_at(geo, np.asarray(x0, dtype=float), _factor_index(result, factor), n)


def _factor_index(result: PlanResult, factor) -> int:
    if isinstance(factor, str):
        return result.space.index(factor)
    return int(factor)


def slice_at(geo: _Geometry, x0: np.ndarray, j: int, n: int) -> SliceData:
    discrete = j in geo.levels
    if discrete:
        t = geo.feasible_levels(j)
    else:
        lo, hi = geo.segment(x0, j)
        t = np.unique(np.concatenate([np.linspace(lo, hi, n), [x0[j]]]))
    X = geo.move(x0, {j: t})
    keep = np.asarray(geo.space.contains(X))
    t, X = t[keep], X[keep]
    mean, sd = {}, {}
    for name in geo.protocol.response_names:
        mean[name], sd[name] = geo.predict(name, X)
    rates = frozenset(item.name for item in geo.protocol.binomial_responses)
    return SliceData(j, t, X, mean, sd, discrete, geo.moves_in_proportion([j]), rates)


def map_data(result: PlanResult, x0, factors: Sequence[int | str], *, n: int = MAP_POINTS) -> MapData:
    """The joint figure and the objective's posterior mean over two factors.

    Parameters
    ----------
    result : PlanResult
    x0 : array of shape (n_factors,)
        Values of the other factors. When a mapped factor is a mixture
        component, the remaining free components are scaled in proportion
        so that the total holds.
    factors : two ints or names
    n : int
        Grid points per continuous factor (a discrete factor takes its levels).

    Returns
    -------
    MapData
    """
    geo = _Geometry(result)
    a, b = (_factor_index(result, f) for f in factors)
    return map_at(geo, np.asarray(x0, dtype=float), a, b, n)


def _grid_values(geo: _Geometry, j: int, n: int) -> np.ndarray:
    if j in geo.levels:
        return geo.feasible_levels(j)
    return np.linspace(geo.ranges[j, 0], geo.ranges[j, 1], n)


def map_at(geo: _Geometry, x0: np.ndarray, a: int, b: int, n: int) -> MapData:
    gx, gy = _grid_values(geo, a, n), _grid_values(geo, b, n)
    A, B = np.meshgrid(gx, gy)
    X = geo.move(x0, {a: A.ravel(), b: B.ravel()})
    inside = np.asarray(geo.space.contains(X))
    joint = np.full(X.shape[0], np.nan)
    obj = np.full(X.shape[0], np.nan)
    if np.any(inside):
        joint[inside] = geo.joint(X[inside])
        m, sd = geo.predict(geo.protocol.objective.name, X[inside])
        obj[inside] = objective_band(m, sd, objective_scale(geo.protocol).get("scale"))[0]  # a rate: its mean
    shape = A.shape
    return MapData((a, b), gx, gy, X.reshape(shape + (geo.d,)), inside.reshape(shape),
                   geo.forbidden(X).reshape(shape), joint.reshape(shape), obj.reshape(shape))


def default_map_factors(result: PlanResult) -> tuple[int, int] | None:
    """The two free factors the fitted models are most sensitive to.

    Sensitivity of a factor is the largest 1 / length scale over the fitted
    models (unit-cube coordinates, so every factor's range counts the
    same). A pair of mixture components whose sum cannot change is skipped.
    None when fewer than two factors can move.
    """
    geo = _Geometry(result)
    movable = [int(j) for j in geo.free_idx if j not in geo.levels or geo.feasible_levels(j).size > 1]
    if len(movable) < 2:
        return None
    sens = np.zeros(geo.d)
    for model in result.fitted.values():
        if model is None:
            continue
        ls = np.asarray(model.hyperparameters.length_scales, dtype=float)
        sens[geo.free_idx] = np.maximum(sens[geo.free_idx], 1.0 / ls)
    order = sorted(movable, key=lambda j: (-sens[j], j))
    for i, first in enumerate(order):
        for second in order[i + 1:]:
            if geo.can_move([first, second]):
                return first, second
    return None


def check_factor_names(names: Sequence[str], known: Sequence[str]) -> None:
    """Refuse a ``--map`` factor name that is not one of ``known``.

    Raises
    ------
    ProtocolError
        Naming the first unknown factor and listing the known ones.
    """
    for n in names:
        if n not in known:
            raise ProtocolError(f"--map: unknown factor {n!r}; the factors are: " + ", ".join(known))


def check_map_factors(result: PlanResult, names: Sequence[str]) -> tuple[int, int]:
    """The indices of the two ``--map`` factors, once they are known to be able to move together.

    Raises
    ------
    ProtocolError
        Not two names, an unknown or fixed factor, or two mixture
        components whose sum cannot change.
    """
    geo = _Geometry(result)
    if len(names) != 2:
        raise ProtocolError(f"--map takes two factor names, got {len(names)}: {list(names)}")
    check_factor_names(names, result.protocol.factor_names)
    a, b = (result.space.index(n) for n in names)
    if a == b:
        raise ProtocolError(f"--map names {names[0]!r} twice; give two different factors")
    for j in (a, b):
        if not geo.free[j] or (j in geo.levels and geo.feasible_levels(j).size < 2):
            raise ProtocolError(
                f"--map: factor {geo.protocol.factor_names[j]!r} is fixed in this design space; "
                "choose a factor that can move")
    if not geo.can_move([a, b]):
        raise ProtocolError(
            f"--map: {names[0]!r} and {names[1]!r} are the only free mixture components, so "
            "their sum cannot change; pair one of them with another factor")
    return a, b
