"""Feasible combinations of the discrete levels of a design space.

Rows of ``A_eq`` / ``A_ub`` split into "mixed" rows, which touch a free
continuous factor and so shape the continuous slice, and the rest, which a
level combination meets or not on its own (checked exactly, in bulk).
Combinations that shift the mixed rows by the same amounts share one slice:
its LP is solved once and cached under that shift.
"""

from __future__ import annotations

import itertools
import math
from functools import cached_property
from typing import TYPE_CHECKING

import numpy as np

from guardband.planner.errors import ProtocolError
from guardband.planner.settings import FEASIBILITY_TOL, FIXED_RANGE_TOL
from guardband.planner.space.arrays import read_only
from guardband.planner.space.slices import Slice, SliceFamily

if TYPE_CHECKING:
    from guardband.planner.space.polytope import DesignSpace

__all__ = ["LevelCombinations", "MAX_ENUMERATED_COMBINATIONS", "N_SAMPLED_COMBINATIONS"]

#: Level combinations are enumerated (and each checked with an LP) up to this count.
MAX_ENUMERATED_COMBINATIONS = 10_000
#: Combinations drawn at random when there are more than MAX_ENUMERATED_COMBINATIONS.
N_SAMPLED_COMBINATIONS = 2_000


class LevelCombinations:
    """The level combinations of one design space, and the slice of each.

    Parameters
    ----------
    space : DesignSpace
        A space that is not empty; its reachable ranges and relaxed slice are
        used. :class:`DesignSpace` makes one of these on first use and keeps
        it, with every slice found so far.
    """

    def __init__(self, space: DesignSpace):
        self.space = space
        self.columns = space._discrete  # column of each discrete factor
        self._slices: dict[tuple, Slice | None] = {}

    @cached_property
    def _setup(self) -> tuple[SliceFamily, np.ndarray, np.ndarray, np.ndarray]:
        """Slice family of the continuous factors, fixed columns, mixed eq and ub rows."""
        s = self.space
        r = s._geometry[0]
        width = r[:, 1] - r[:, 0]
        fixed = width < FIXED_RANGE_TOL
        fixed[self.columns] = True
        free = ~fixed
        mixed_eq = np.any(s.A_eq[:, free] != 0, axis=1)
        mixed_ub = np.any(s.A_ub[:, free] != 0, axis=1)
        family = SliceFamily(s, fixed, r[:, 0], np.where(fixed, 1.0, width),
                             s.lower, s.upper, mixed_eq, mixed_ub)
        return family, fixed, mixed_eq, mixed_ub

    @cached_property
    def n_all(self) -> int:
        """Number of combinations, feasible or not."""
        return math.prod(int(lv.size) for lv in self.space.levels.values())

    @cached_property
    def enumerated(self) -> np.ndarray:
        """All feasible level combinations, shape (n_feasible, n_discrete)."""
        cand = self._candidates()
        if any(c.size == 0 for c in cand):
            return np.zeros((0, self.columns.size))
        V = np.array(list(itertools.product(*cand)), dtype=float)
        return read_only(V[self.feasible(V)])

    def _candidates(self) -> list[np.ndarray]:
        """Levels of each discrete factor that fall inside its reachable range."""
        ranges = self.space._geometry[0]
        out = []
        for j in self.columns:
            lv = self.space.levels[j]
            tol = FEASIBILITY_TOL * max(1.0, float(np.max(np.abs(lv))))
            out.append(lv[(lv >= ranges[j, 0] - tol) & (lv <= ranges[j, 1] + tol)])
        return out

    def _points(self, V: np.ndarray) -> np.ndarray:
        """Relaxed centre with the discrete columns set to each combination, (n, n_factors)."""
        X = np.repeat(self.space._geometry[1].base[None, :], V.shape[0], axis=0)
        X[:, self.columns] = V
        return X

    def shift_key(self, V: np.ndarray) -> np.ndarray:
        """How each combination (n, n_discrete) shifts the mixed rows, (n, n_mixed)."""
        _, _, mixed_eq, mixed_ub = self._setup
        s, D = self.space, self.columns
        return np.hstack([V @ s.A_eq[mixed_eq][:, D].T, V @ s.A_ub[mixed_ub][:, D].T])

    def feasible(self, V: np.ndarray) -> np.ndarray:
        """Which combinations (rows of V, shape (n, n_discrete)) admit a point."""
        s = self.space
        family, fixed, mixed_eq, mixed_ub = self._setup
        X = self._points(V)
        ok = np.ones(V.shape[0], dtype=bool)
        scale = FEASIBILITY_TOL * s._tol_scale
        n_b, n_l = s.n_factors, len(s.levels)
        eq_scale = scale[n_b + n_l: n_b + n_l + s.A_eq.shape[0]]
        ub_scale = scale[n_b + n_l + s.A_eq.shape[0]:]
        # Rows that only involve discrete and fixed factors: exact test.
        if (~mixed_eq).any():
            r = np.abs(X @ s.A_eq[~mixed_eq].T - s.b_eq[~mixed_eq])
            ok &= np.all(r <= eq_scale[~mixed_eq], axis=1)
        if (~mixed_ub).any():
            r = X @ s.A_ub[~mixed_ub].T - s.b_ub[~mixed_ub]
            ok &= np.all(r <= ub_scale[~mixed_ub], axis=1)
        # Mixed rows: a necessary test over the continuous ranges, then the LP.
        ranges = s._geometry[0]
        cont = ~fixed
        lo, hi = ranges[cont, 0], ranges[cont, 1]
        for A, b, rows, tol, is_eq in ((s.A_ub, s.b_ub, mixed_ub, ub_scale, False),
                                       (s.A_eq, s.b_eq, mixed_eq, eq_scale, True)):
            if not rows.any():
                continue
            Ac = A[rows][:, cont]
            rest = X @ A[rows].T - X[:, cont] @ Ac.T  # fixed and discrete part
            smin = np.minimum(Ac * lo, Ac * hi).sum(axis=1)
            smax = np.maximum(Ac * lo, Ac * hi).sum(axis=1)
            ok &= np.all(rest + smin <= b[rows] + tol[rows], axis=1)
            if is_eq:
                ok &= np.all(rest + smax >= b[rows] - tol[rows], axis=1)
        idx = np.flatnonzero(ok)
        if idx.size:
            keys = np.round(self.shift_key(V[idx]), 12)
            _, first, inverse = np.unique(keys, axis=0, return_index=True, return_inverse=True)
            has_slice = np.array([self.slice_for(V[idx[i]]) is not None for i in first])
            ok[idx] = has_slice[inverse.reshape(-1)]
        return ok

    def slice_for(self, combo: np.ndarray) -> Slice | None:
        """Slice of the continuous factors for a combination (cached by its row shift)."""
        key = tuple(np.round(self.shift_key(combo[None, :])[0], 12))
        cache = self._slices
        if key not in cache:
            family = self._setup[0]
            v = self._points(combo[None, :])[0]
            sl = family.build(v)
            if sl is not None and not self.space.contains(sl.base)[0]:
                sl = None
            cache[key] = sl
        return cache[key]

    def draw(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """A feasible combination for each of n samples, uniform over the feasible ones."""
        D = self.columns
        if self.n_all <= MAX_ENUMERATED_COMBINATIONS:
            combos = self.enumerated
            if combos.shape[0] == 0:
                raise ProtocolError(self.space.check().message)
            return combos[rng.integers(combos.shape[0], size=n)]
        # Too many to enumerate: draw uniformly and keep the feasible ones.
        cand = self._candidates()
        out, have, drawn = np.empty((n, D.size)), 0, 0
        while have < n and drawn < 50 * max(n, N_SAMPLED_COMBINATIONS):
            m = max(2 * (n - have), 64)
            V = np.column_stack([c[rng.integers(c.size, size=m)] for c in cand])
            V = V[self.feasible(V)][: n - have]
            out[have: have + V.shape[0]] = V
            have += V.shape[0]
            drawn += m
        if have < n:
            raise ProtocolError(
                f"only {have} of {drawn} random combinations of the levels of "
                f"{', '.join(self.space.names[j] for j in D)} were feasible; the feasible "
                "ones are too rare to sample; narrow the levels to those that can occur"
            )
        return out

    def nearest(self, y: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, Slice]:
        """Feasible level combination nearest (scaled by ``w``) to y's discrete part."""
        D, levels = self.columns, self.space.levels
        snapped = np.array([levels[j][np.argmin(np.abs(levels[j] - y[j]))] for j in D])
        if self.feasible(snapped[None, :])[0]:
            return snapped, self.slice_for(snapped)
        if self.n_all <= MAX_ENUMERATED_COMBINATIONS:
            combos = self.enumerated
        else:
            combos = self.draw(N_SAMPLED_COMBINATIONS, np.random.default_rng(0))
        dist = np.sum(((combos - y[D]) / w[D]) ** 2, axis=1)
        best = combos[int(np.argmin(dist))]
        return best, self.slice_for(best)
