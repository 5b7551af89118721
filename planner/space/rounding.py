"""Amounts that can be weighed: points rounded to each factor's ``resolution``.

A factor that states a resolution ``r`` takes multiples of ``r`` only. A
continuous factor goes to the nearest multiple inside its bounds. The
components of a mixture that can vary share one resolution (the protocol
checks this) and must still add up to the total: each is rounded down to
the grid, then the units still missing go one at a time to the components
with the largest remainders (largest-remainder, or Hamilton, apportionment),
never past a bound; a surplus is taken back from the smallest remainders.
Fixed factors are left as they are. :meth:`Rounding.neighbours` lists the
grid points next to a point's rounding (one factor the other way, one unit
moved between two components), so that a refined point whose rounding
fails the screen can be replaced by a nearby one that passes. A rounded
point that leaves the design
space (a rule of the protocol, say) is reported as not roundable; the caller
screens every rounded point again. :func:`off_grid` says which values of
given points (a chemist's own recipes) are not multiples of their resolution.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Rounding", "rounding_of", "on_grid", "off_grid"]

#: Slack, in grid units, when a value or bound is read as a multiple of its resolution.
GRID_EPS = 1e-9


@dataclass(frozen=True)
class Rounding:
    """Which factors are rounded, and how (from a protocol)."""

    resolution: np.ndarray  # (d,), NaN where none or fixed
    mixture: np.ndarray  # (d,) bool: varying components rounded together
    share_units: int  # grid units the varying components add up to
    lo_units: np.ndarray  # (d,) smallest grid multiple inside the bounds
    hi_units: np.ndarray  # (d,) largest grid multiple inside the bounds
    names: tuple[str, ...]

    @property
    def any(self) -> bool:
        return bool(np.any(np.isfinite(self.resolution)))

    def describe(self) -> str:
        return ", ".join(f"{n} {r:g}" for n, r in zip(self.names, self.resolution) if np.isfinite(r))

    def round(self, X) -> np.ndarray:
        """Each row of X rounded to the grid (protocol units)."""
        X = np.array(X, dtype=float, ndmin=2)
        out = X.copy()
        res = self.resolution
        single = np.isfinite(res) & ~self.mixture
        if np.any(single):
            k = np.clip(np.round(X[:, single] / res[single]), self.lo_units[single], self.hi_units[single])
            out[:, single] = k * res[single]
        if np.any(self.mixture):
            out[:, self.mixture] = self._apportion(X[:, self.mixture])
        return out

    def neighbours(self, x) -> np.ndarray:
        """Grid points around one point: its rounding, each single factor rounded the other way,
        and each move of one grid unit between two varying components (bounds kept)."""
        base = self.round(x)[0]
        out = [base]
        res = self.resolution
        for j in np.flatnonzero(np.isfinite(res) & ~self.mixture):
            k = base[j] / res[j]
            for step in (-1.0, 1.0):
                if self.lo_units[j] <= round(k) + step <= self.hi_units[j]:
                    y = base.copy()
                    y[j] = (round(k) + step) * res[j]
                    out.append(y)
        comps = np.flatnonzero(self.mixture)
        for a in comps:
            for b in comps:
                ka, kb = round(base[a] / res[a]), round(base[b] / res[b])
                if a != b and ka + 1 <= self.hi_units[a] and kb - 1 >= self.lo_units[b]:
                    y = base.copy()
                    y[a], y[b] = (ka + 1) * res[a], (kb - 1) * res[b]
                    out.append(y)
        return np.array(out)

    def _apportion(self, Xm) -> np.ndarray:
        r = float(self.resolution[self.mixture][0])
        lo, hi = self.lo_units[self.mixture], self.hi_units[self.mixture]
        q = Xm / r
        k = np.clip(np.floor(q + GRID_EPS), lo, hi)
        rem = q - k
        for i in range(k.shape[0]):
            missing = int(self.share_units - k[i].sum())
            # one unit at a time, largest remainder first (ties: the earlier factor)
            while missing > 0:
                room = np.flatnonzero(k[i] < hi)
                j = room[np.lexsort((room, -rem[i, room]))[0]]
                k[i, j] += 1
                rem[i, j] -= 1.0
                missing -= 1
            while missing < 0:
                room = np.flatnonzero(k[i] > lo)
                j = room[np.lexsort((room, rem[i, room]))[0]]
                k[i, j] -= 1
                rem[i, j] += 1.0
                missing += 1
        return k * r


def rounding_of(protocol) -> Rounding:
    """The rounding a protocol asks for (``resolution`` on its factors)."""
    d = len(protocol.factors)
    res = np.full(d, np.nan)
    mixture = np.zeros(d, dtype=bool)
    lo_u, hi_u = np.zeros(d), np.zeros(d)
    fixed_total = 0.0
    for j, f in enumerate(protocol.factors):
        if f.kind == "component" and f.lower == f.upper:
            fixed_total += f.lower
        if f.kind == "discrete" or f.resolution is None or f.lower == f.upper:
            continue
        r = float(f.resolution)
        res[j] = r
        mixture[j] = f.kind == "component"
        lo_u[j] = np.ceil(f.lower / r - GRID_EPS)
        hi_u[j] = np.floor(f.upper / r + GRID_EPS)
    share = 0
    if np.any(mixture):
        share = int(round((protocol.mixture.total - fixed_total) / float(res[mixture][0])))
    return Rounding(res, mixture, share, lo_u, hi_u, protocol.factor_names)


def off_grid(X, resolution) -> np.ndarray:
    """Which values are not multiples of their factor's resolution, shape (n, d) (NaN: any value)."""
    X = np.array(X, dtype=float, ndmin=2)
    r = np.asarray(resolution, dtype=float)
    out = np.zeros(X.shape, dtype=bool)
    has = np.isfinite(r)
    q = X[:, has] / r[has]
    out[:, has] = np.abs(q - np.round(q)) > 1e-6
    return out


def on_grid(X, resolution) -> np.ndarray:
    """Whether each row's values are multiples of their resolution (NaN: any value)."""
    return ~np.any(off_grid(X, resolution), axis=1)
