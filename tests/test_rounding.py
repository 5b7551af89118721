"""Amounts that can be weighed: proposals rounded to each factor's resolution."""

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from guardband.planner.errors import ProtocolError
from guardband.planner.inputs.protocol import load_protocol, parse_protocol
from guardband.planner.inputs.runs import read_runs
from guardband.planner.space.rounding import Rounding, off_grid, on_grid, rounding_of
from guardband.planner.space.sampler import sample
from guardband.planner.step import plan_step

from conftest import PROTOCOLS

RES = 0.001  # of a fraction
FORCE_RES = 0.5  # kN


def _tablet(resolution=RES, force=FORCE_RES):
    data = load_protocol(PROTOCOLS / "tablet_blend.toml").model_dump(mode="python")
    for f in data["factors"]:
        if f["kind"] == "component" and f["lower"] < f["upper"]:
            f["resolution"] = resolution
        if f["name"] == "force":
            f["resolution"] = force
    return parse_protocol(data)


@pytest.fixture(scope="module")
def tablet():
    return _tablet()


@pytest.fixture(scope="module")
def points(tablet):
    return sample(tablet.design_space(), 400, rng=np.random.default_rng(0))


def test_rounded_points_are_on_the_grid_within_bounds_and_keep_the_total(tablet, points):
    rnd = rounding_of(tablet)
    R = rnd.round(points)
    assert on_grid(R, rnd.resolution).all()
    lo = np.array([f.low for f in tablet.factors])
    hi = np.array([f.high for f in tablet.factors])
    assert np.all(R >= lo - 1e-12) and np.all(R <= hi + 1e-12)
    comp = np.array([f.kind == "component" for f in tablet.factors])
    np.testing.assert_allclose(R[:, comp].sum(axis=1), 1.0, atol=1e-12)
    # the fixed active (no resolution needed) is left alone
    np.testing.assert_array_equal(R[:, 0], points[:, 0])
    # each value moves by less than one grid step (mg_stearate's bound 0.0025 is off the grid: the
    # smallest multiple inside it is 0.003, so it may move up to 0.0005 further)
    step = np.where(np.isfinite(rnd.resolution), rnd.resolution, 0.0)
    assert np.all(np.abs(R - points) <= step + 5e-4 + 1e-12)
    assert tablet.design_space().contains(R).all()


def _brute_l1(q, share):
    """The smallest sum |k_i - q_i| over integer k >= 0 with sum k = share (enumerated)."""
    best = np.inf
    for k in itertools.product(range(share + 1), repeat=len(q) - 1):
        last = share - sum(k)
        if last >= 0:
            best = min(best, np.abs(np.array([*k, last]) - q).sum())
    return best


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(0.0, 1.0), min_size=3, max_size=4))
def test_largest_remainder_apportionment_is_l1_optimal(weights):
    # Hamilton (largest-remainder) apportionment minimises the total absolute
    # deviation from the exact quotas among integer apportionments with the
    # right total (Balinski & Young, Fair Representation, 1982; from memory),
    # checked here against enumeration, with bounds wide enough not to bind.
    w = np.array(weights) + 1e-3
    share = 12
    q = share * w / w.sum()
    n = len(q)
    rnd = Rounding(resolution=np.full(n, 1 / share), mixture=np.ones(n, dtype=bool), share_units=share,
                   lo_units=np.zeros(n), hi_units=np.full(n, float(share)), names=tuple(f"c{i}" for i in range(n)))
    k = rnd.round(q[None, :] / share)[0] * share
    np.testing.assert_allclose(k, np.round(k), atol=1e-9)
    assert round(k.sum()) == share
    assert np.abs(k - q).sum() <= _brute_l1(q, share) + 1e-9


def test_every_rounded_proposal_is_on_the_grid_inside_and_passes_the_screen(tablet):
    runs = read_runs(PROTOCOLS / "tablet_blend_runs.csv", tablet)
    result = plan_step(tablet, runs, seed=4, pool_size=800, explain=False)
    assert result.proposals, result.messages
    X = np.array([q.x for q in result.proposals])
    assert on_grid(X, rounding_of(tablet).resolution).all()
    assert tablet.design_space().contains(X).all()
    for q in result.proposals:
        assert q.joint >= tablet.screen.threshold
        assert all(q.p[lim.name] >= lim.probability for lim in tablet.limits)
        assert q.origin.endswith("rounded") or on_grid(q.x[None, :], rounding_of(tablet).resolution)[0]
    assert any("rounded to its factors' resolution" in m for m in result.messages)
    # the screen's own survivors are exactly the rounded candidates that pass
    assert on_grid(result.pool[result.screen.survives], rounding_of(tablet).resolution).all()


def test_the_rule_picks_and_the_price_of_a_threshold_stand_on_the_grid(tablet):
    """The best predicted objective at each threshold is that of a recipe the lab can weigh:
    the price's local search is rounded as the plan's is (it used to report an off-grid point)."""
    runs = read_runs(PROTOCOLS / "tablet_blend_runs.csv", tablet)
    result = plan_step(tablet, runs, seed=4, pool_size=800)
    res = rounding_of(tablet).resolution
    names = list(tablet.factor_names)
    priced = [e for e in result.threshold_price if e["x"] is not None]
    assert priced
    X = np.array([[e["x"][n] for n in names] for e in priced])
    assert on_grid(X, res).all()
    assert tablet.design_space().contains(X).all()
    picks = [p for p in result.rule_picks if p.get("x") is not None]
    assert picks and on_grid(np.array([[p["x"][n] for n in names] for p in picks]), res).all()


def test_a_protocol_without_resolution_keeps_its_fingerprint():
    p = load_protocol(PROTOCOLS / "tablet_blend.toml")
    assert b"resolution" not in p.canonical()
    assert _tablet().fingerprint != p.fingerprint


def test_mixed_resolutions_in_a_mixture_are_refused():
    data = _tablet().model_dump(mode="python")
    data["factors"][1]["resolution"] = 0.002
    with pytest.raises(ProtocolError, match="same `resolution`"):
        parse_protocol(data)


def test_a_discrete_factor_takes_levels_not_resolution():
    data = load_protocol(PROTOCOLS / "dose_combination.toml").model_dump(mode="python")
    discrete = [f for f in data["factors"] if f["kind"] == "discrete"]
    if not discrete:
        pytest.skip("the dose example has no discrete factor")
    discrete[0]["resolution"] = 1.0
    with pytest.raises(ProtocolError, match="not `resolution`"):
        parse_protocol(data)


def test_a_resolution_with_no_multiple_inside_the_bounds_is_refused():
    data = load_protocol(PROTOCOLS / "tablet_blend.toml").model_dump(mode="python")
    force = next(f for f in data["factors"] if f["name"] == "force")
    force.update(lower=6.1, upper=6.4, resolution=0.5)
    with pytest.raises(ProtocolError, match="no multiple of its resolution"):
        parse_protocol(data)


def test_grid_neighbours_are_on_the_grid_keep_the_total_and_bounds(tablet, points):
    rnd = rounding_of(tablet)
    lo = np.array([f.low for f in tablet.factors])
    hi = np.array([f.high for f in tablet.factors])
    comp = np.array([f.kind == "component" for f in tablet.factors])
    for x in points[:20]:
        N = rnd.neighbours(x)
        assert N.shape[0] > 1
        np.testing.assert_array_equal(N[0], rnd.round(x)[0])
        assert on_grid(N, rnd.resolution).all()
        assert np.all(N >= lo - 1e-12) and np.all(N <= hi + 1e-12)
        np.testing.assert_allclose(N[:, comp].sum(axis=1), 1.0, atol=1e-12)


def test_off_grid_names_each_value_that_is_not_a_multiple():
    # by hand: 0.337 = 337 x 0.001 (on), 0.3374 is not; 12.5 = 25 x 0.5 (on), 12.7 is not; NaN: no resolution
    X = [[0.337, 12.5, 3.14159], [0.3374, 12.7, 2.0]]
    off = off_grid(X, [0.001, 0.5, np.nan])
    assert off.tolist() == [[False, False, False], [True, True, False]]
    assert on_grid(X, [0.001, 0.5, np.nan]).tolist() == [True, False]


def test_the_starting_design_is_on_the_grid_inside_the_space_and_its_start_region(tablet):
    """`start` writes runs the lab can weigh: a resolution binds the starting design as it binds a plan."""
    from guardband.planner.app.workflow import start_design

    rnd = rounding_of(tablet)
    header, rows, notes = start_design(tablet, 12, seed=3)
    X = np.array([row[1:1 + len(tablet.factors)] for row in rows], dtype=float)
    assert on_grid(X, rnd.resolution).all()
    assert tablet.design_space().contains(X).all()
    assert any("resolution" in n for n in notes)
    # with a starting region, every rounded run also stays inside it
    data = tablet.model_dump(mode="python")
    data["start"] = {"rules": ["force <= 9", "croscarmellose >= 0.03"]}
    region = parse_protocol(data)
    _, rows, _ = start_design(region, 8, seed=5)
    X = np.array([row[1:1 + len(region.factors)] for row in rows], dtype=float)
    assert on_grid(X, rnd.resolution).all()
    assert np.all(X[:, region.factor_names.index("force")] <= 9 + 1e-12)
    assert np.all(X[:, region.factor_names.index("croscarmellose")] >= 0.03 - 1e-12)
    assert region.design_space().contains(X).all()


def test_the_rounding_note_speaks_of_a_mixture_only_when_there_is_one(tablet):
    from conftest import unit_square_protocol

    data = unit_square_protocol({"name": "g", "upper": 1.0, "probability": 0.9},
                                screen={"threshold": 0.9, "min_runs": 3}, batch={"size": 1, "pool": 200})
    data["factors"][0]["resolution"] = 0.05
    square = parse_protocol(data)
    rng = np.random.default_rng(2)
    X = rng.uniform(0, 1, (8, 2))
    text = "run_id,x1,x2,y,g\n" + "".join(f"R{i},{a:.4f},{b:.4f},{a + b:.4f},{0.5 * a:.4f}\n"
                                          for i, (a, b) in enumerate(X))
    from guardband.planner.inputs.runs import parse_runs_text

    result = plan_step(square, parse_runs_text(text, square, source="r.csv"), seed=1, explain=False)
    note = next(m for m in result.messages if "rounded to its factors' resolution" in m)
    assert "x1 0.05" in note and "mixture" not in note
    runs = read_runs(PROTOCOLS / "tablet_blend_runs.csv", tablet)
    note = next(m for m in plan_step(tablet, runs, seed=4, pool_size=300, explain=False).messages
                if "rounded to its factors' resolution" in m)
    assert "a mixture's total restored by largest remainders" in note
