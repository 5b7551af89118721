"""Quadratic response-surface models fitted by least squares (the classical route's models).

Scheffé's canonical quadratic without intercept over mixture components
(Scheffé 1958, from memory), with component-by-factor products and
squares and products of the other free factors; the full quadratic in the
unit-scaled free factors when there is no mixture.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from guardband.planner.space.designs import mixture_rows

__all__ = ["QuadraticModel", "fit_quadratic"]


@dataclass(frozen=True)
class QuadraticModel:
    """A quadratic response-surface model fitted by least squares.

    Attributes
    ----------
    terms : tuple of str
        Readable names of the model terms.
    coef : ndarray of shape (n_terms,)
    kind : str
        "scheffe" (mixture, no intercept) or "full".
    rank : int
        Rank of the design matrix (below ``len(terms)`` when the runs cannot
        separate every term; the minimum-norm solution is used then).
    """

    terms: tuple[str, ...]
    coef: np.ndarray
    kind: str
    rank: int
    _basis: object = field(repr=False, compare=False)

    def predict(self, X) -> np.ndarray:
        """Predictions for points X of shape (n, n_factors); returns shape (n,)."""
        return self._basis(np.atleast_2d(np.asarray(X, dtype=float))) @ self.coef


def _quadratic_basis(space, names):
    """Design-matrix function and term names for a quadratic model over the free factors."""
    free = np.flatnonzero(np.asarray(space.free))
    comps = [j for j in free if j in set(_components(space))]
    others = [j for j in free if j not in comps]
    r = space.check().ranges
    lo = r[:, 0]
    w = np.where(r[:, 1] - r[:, 0] > 0, r[:, 1] - r[:, 0], 1.0)
    if len(comps) >= 2:
        total = next(t for idx, t in mixture_rows(space) if set(comps) <= set(idx))
        terms = [names[i] for i in comps]
        terms += [f"{names[i]}*{names[j]}" for a, i in enumerate(comps) for j in comps[a + 1:]]
        terms += [f"{names[i]}*{names[k]}" for i in comps for k in others]
        terms += [f"{names[k]}^2" for k in others]
        terms += [f"{names[k]}*{names[m]}" for a, k in enumerate(others) for m in others[a + 1:]]

        def basis(X):
            P = X[:, comps] / total
            Z = (X[:, others] - lo[others]) / w[others]
            cols = [P]
            cols += [P[:, a:a + 1] * P[:, a + 1:] for a in range(len(comps) - 1)]
            cols += [P[:, a:a + 1] * Z for a in range(len(comps))]
            cols += [Z**2]
            cols += [Z[:, a:a + 1] * Z[:, a + 1:] for a in range(len(others) - 1)]
            return np.hstack([c.reshape(X.shape[0], -1) for c in cols])

        return basis, tuple(terms), "scheffe"
    terms = ["1"] + [names[k] for k in free] + [f"{names[k]}^2" for k in free]
    terms += [f"{names[k]}*{names[m]}" for a, k in enumerate(free) for m in free[a + 1:]]

    def basis(X):
        Z = (X[:, free] - lo[free]) / w[free]
        cols = [np.ones((X.shape[0], 1)), Z, Z**2]
        cols += [Z[:, a:a + 1] * Z[:, a + 1:] for a in range(len(free) - 1)]
        return np.hstack([c.reshape(X.shape[0], -1) for c in cols])

    return basis, tuple(terms), "full"


def _components(space) -> list[int]:
    rows = mixture_rows(space)
    return sorted({int(j) for idx, _ in rows for j in idx})


def fit_quadratic(X, y, space) -> QuadraticModel:
    """Fit a quadratic model to one response by least squares.

    Parameters
    ----------
    X : array of shape (n_runs, n_factors)
        Runs in protocol units.
    y : array of shape (n_runs,)
    space : DesignSpace
        Says which factors are free and which are mixture components.

    Returns
    -------
    QuadraticModel
        Scheffé's canonical quadratic (no intercept) over the free mixture
        components, with component-by-factor products and squares and
        products of the other free factors (unit-scaled); or the full
        quadratic in the unit-scaled free factors when there is no mixture.
    """
    X = np.asarray(X, dtype=float)
    y = np.asarray(y, dtype=float)
    basis, terms, kind = _quadratic_basis(space, space.names)
    F = basis(X)
    ok = np.isfinite(y)
    coef, _, rank, _ = np.linalg.lstsq(F[ok], y[ok], rcond=None)
    return QuadraticModel(terms, coef, kind, int(rank), basis)
