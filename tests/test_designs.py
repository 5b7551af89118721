"""Starting designs: NIST mixture designs, pseudo-components, maximin and the default start."""

from __future__ import annotations

import itertools
import math
import re

import numpy as np
import pytest
from scipy.spatial.distance import pdist

from guardband.planner.space import (
    DesignSpace,
    maximin,
    mixture_design,
    mixture_rows,
    pseudo_to_real,
    real_to_pseudo,
    simplex_centroid,
    simplex_lattice,
    starting_design,
)
from guardband.planner.errors import ProtocolError


def blend_space(upper_c: float = 0.3) -> DesignSpace:
    """NIST 5.5.4.4 bounds x1 >= 0.3, x2 >= 0.4, x3 >= 0.1 plus a temperature."""
    return DesignSpace(("x1", "x2", "x3", "temp"), [0.3, 0.4, 0.1, 20], [1, 1, upper_c, 80],
                       A_eq=[[1, 1, 1, 0]], b_eq=[1], eq_labels=("mixture total",),
                       ub_labels=(), units=("", "", "", "degC"))


def min_distance(space: DesignSpace, X: np.ndarray) -> float:
    return float(pdist(space.to_unit(X)[:, space.free]).min())


# ---------------------------------------------------------- classical designs
@pytest.mark.parametrize("q, count", [(3, 7), (4, 15)])
def test_simplex_centroid_count_is_published(q, count):
    # NIST/SEMATECH e-Handbook 5.5.4.3 (published): 2^q - 1 points, 7 for q=3, 15 for q=4.
    X = simplex_centroid(q)
    assert X.shape == (count, q) == (2**q - 1, q)
    np.testing.assert_allclose(X.sum(axis=1), 1.0, atol=1e-15)
    # Every point gives equal shares to a non-empty subset, and every subset occurs once.
    supports = {tuple(np.flatnonzero(r > 0)) for r in X}
    assert len(supports) == count
    for r in X:
        np.testing.assert_allclose(r[r > 0], 1.0 / np.count_nonzero(r), atol=1e-15)


@pytest.mark.parametrize("q, m, count", [(3, 2, 6), (4, 3, 20), (3, 1, 3), (5, 2, 15)])
def test_simplex_lattice_count_and_levels(q, m, count):
    # NIST/SEMATECH e-Handbook 5.5.4.2: C(q+m-1, m) points (count formula from memory;
    # {3,2} = 6 and {4,3} = 20 by enumeration), proportions 0, 1/m, ..., 1.
    X = simplex_lattice(q, m)
    assert X.shape == (count, q) and count == math.comb(q + m - 1, m)
    np.testing.assert_allclose(X.sum(axis=1), 1.0, atol=1e-12)
    np.testing.assert_allclose(X * m, np.round(X * m), atol=1e-12)
    # Same set as brute force over the grid (itertools).
    brute = {p for p in itertools.product(range(m + 1), repeat=q) if sum(p) == m}
    assert {tuple(np.round(r * m).astype(int)) for r in X} == brute


def test_bad_counts_raise():
    with pytest.raises(ValueError, match="q must be a positive integer"):
        simplex_centroid(0)
    with pytest.raises(ValueError, match="m must be a positive integer"):
        simplex_lattice(3, 1.5)


# --------------------------------------------------------- pseudo-components
def test_pseudo_components_nist_worked_example():
    # NIST/SEMATECH e-Handbook 5.5.4.4 (published): L = (0.3, 0.4, 0.1), L = 0.8.
    lower = [0.3, 0.4, 0.1]
    np.testing.assert_allclose(pseudo_to_real([1, 0, 0], lower), [0.5, 0.4, 0.1], atol=1e-12)
    centroid = pseudo_to_real(np.full(3, 1 / 3), lower)
    np.testing.assert_allclose(centroid, [0.3667, 0.4667, 0.1667], atol=5e-5)  # 4 decimals given


def test_pseudo_round_trip_and_other_total():
    lower = np.array([10.0, 5.0, 20.0])  # percent, total 100
    P = simplex_lattice(3, 3)
    X = pseudo_to_real(P, lower, total=100.0)
    np.testing.assert_allclose(X.sum(axis=1), 100.0)
    np.testing.assert_allclose(real_to_pseudo(X, lower, total=100.0), P, atol=1e-12)
    assert np.all(X >= lower)


def test_pseudo_components_need_lower_sum_below_total():
    msg = "the component lower bounds sum to 1.1, which is not below the mixture total 1"
    with pytest.raises(ProtocolError, match=re.escape(msg)):
        pseudo_to_real([1, 0], [0.6, 0.5])
    with pytest.raises(ProtocolError, match="not below the mixture total"):
        real_to_pseudo([0.5, 0.5], [0.5, 0.5])


# ------------------------------------------------------------ mixture design
def test_mixture_design_maps_nist_example_into_the_space():
    space = blend_space()
    design = mixture_design(space, [0, 1, 2], kind="centroid")
    assert design.n_candidates == 7 and design.n_dropped == 0
    assert space.contains(design.X).all()
    np.testing.assert_allclose(design.X[0, :3], [0.5, 0.4, 0.1], atol=1e-12)  # NIST 5.5.4.4
    np.testing.assert_allclose(design.X[:, 3], 50.0, atol=1e-9)  # temperature at its centre
    assert design.labels[0] == "vertex x1" and design.labels[-1] == "overall centroid"


def test_mixture_design_drops_points_outside_and_says_why():
    space = blend_space(upper_c=0.2)  # x3 <= 0.2 cuts the pseudo vertex (0.3, 0.4, 0.3)
    design = mixture_design(space, [0, 1, 2], kind="lattice", m=2)
    assert design.n_candidates == 6
    assert design.n_dropped == 1 and design.X.shape[0] == 5
    assert "bounds of x3" in design.message
    assert space.contains(design.X).all()
    assert "lattice x1=1/2, x2=1/2" in design.labels


def test_mixture_design_reads_the_total_from_the_space():
    space = DesignSpace(("a", "b"), [10, 20], [80, 90], A_eq=[[1, 1]], b_eq=[100])
    assert [(list(i), t) for i, t in mixture_rows(space)] == [([0, 1], 100.0)]
    design = mixture_design(space, [0, 1], kind="lattice", m=4)
    np.testing.assert_allclose(design.X.sum(axis=1), 100.0)
    with pytest.raises(ProtocolError, match=re.escape("no equality row makes a, b sum to a total")):
        mixture_design(DesignSpace(("a", "b"), [0, 0], [1, 1]), [0, 1])


# ------------------------------------------------------------------ maximin
def thin_mixture() -> DesignSpace:
    lower = np.array([0.30, 0.20, 0.10, 0.08, 0.06, 0.05, 0.04, 0.03, 0.02, 0.02])
    A_ub = np.zeros((2, 10))
    A_ub[0, [0, 1]] = [-1.0, 1.4]
    A_ub[1, [2, 3]] = [-1.0, 1.0]
    return DesignSpace(tuple(f"c{i + 1}" for i in range(10)), lower, lower + 0.03,
                       A_eq=np.ones((1, 10)), b_eq=[1.0], A_ub=A_ub, b_ub=[0.0, 0.0])


@pytest.mark.parametrize("make", [blend_space, thin_mixture], ids=["blend", "thin mixture"])
def test_maximin_spreads_better_than_random_subsets(make):
    space = make()
    n, pool = 12, 4000
    X = maximin(space, n, rng=3, pool_size=pool)
    assert X.shape == (n, space.n_factors)
    assert space.contains(X).all()
    # Same pool (same seed), random subsets of the same size, seeded.
    P = space.sample(pool, rng=np.random.default_rng(3))
    gap = np.abs(X[:, None, :] - P[None, :, :]).max(axis=2).min(axis=1)
    np.testing.assert_array_equal(gap, 0.0)  # every point was picked from that pool
    rng = np.random.default_rng(0)
    U = space.to_unit(P)[:, space.free]
    random_min = [pdist(U[rng.choice(pool, n, replace=False)]).min() for _ in range(50)]
    assert min_distance(space, X) > max(random_min)


def test_maximin_respects_a_region_and_names_an_empty_one():
    space = blend_space()
    X = maximin(space, 8, rng=1, pool_size=2000, region=([[0, 0, 0, 1]], [35.0]))
    assert space.contains(X).all() and np.all(X[:, 3] <= 35.0 + 1e-9)
    assert np.ptp(X[:, 3]) > 10  # spread over the region, not stuck at one edge
    with pytest.raises(ProtocolError, match=re.escape("the starting region (temp <= 10)")):
        maximin(space, 4, rng=1, region=([[0, 0, 0, 1]], [10.0], ["temp <= 10"]))


def test_maximin_with_discrete_levels_is_on_feasible_levels():
    space = DesignSpace(("dose", "oil", "water"), [0, 0, 0], [40, 1, 1], A_eq=[[0, 1, 1]],
                        b_eq=[1], A_ub=[[1, -30, 0]], b_ub=[0], levels={0: [0, 10, 25, 40]})
    X = maximin(space, 6, rng=2, pool_size=2000)
    assert space.contains(X).all()
    assert set(X[:, 0]) <= {0, 10, 25}  # 40 would need oil > 1
    assert len(set(X[:, 0])) >= 2


# ------------------------------------------------------------ starting design
def test_starting_design_puts_centroid_first_for_a_mixture():
    space = blend_space()
    X, labels = starting_design(space, 10, rng=4)
    assert X.shape == (10, 4) and len(labels) == 10
    assert labels[:7] == mixture_design(space, [0, 1, 2]).labels
    assert labels[7:] == ("space-filling 1", "space-filling 2", "space-filling 3")
    assert space.contains(X).all()
    assert min_distance(space, X) > 0


def test_starting_design_uses_maximin_when_centroid_does_not_fit():
    space = thin_mixture()  # 2^10 - 1 centroid points do not fit in 8
    X, labels = starting_design(space, 8, rng=5)
    assert labels == tuple(f"space-filling {i}" for i in range(1, 9))
    assert space.contains(X).all()


def test_starting_design_in_a_region_stays_inside_it():
    space = blend_space()
    region = ([[0, 0, 0, 1], [-1, 0, 0, 0]], [40.0, -0.35], ["temp <= 40", "x1 >= 0.35"])
    X, labels = starting_design(space, 9, rng=6, region=region)
    assert space.contains(X).all()
    assert np.all(X[:, 3] <= 40 + 1e-9) and np.all(X[:, 0] >= 0.35 - 1e-9)
