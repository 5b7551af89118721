"""The generated problem family: determinism, valid protocols, coverage, optima, shares."""

from __future__ import annotations

import importlib.util
import math
import sys
from pathlib import Path

import numpy as np
import pytest

from guardband.planner.inputs.protocol import parse_protocol
from guardband.planner.models.parallel import map_jobs
from guardband.planner.settings import (
    FAMILY_ACTIVE_TOL,
    FAMILY_FEASIBLE_SHARE,
    FAMILY_NOISE_SHARES,
    FAMILY_SIZE,
    FAMILY_START_BOX_SHARE,
)
from guardband.planner.simulation.family import (
    DIMENSIONS,
    SHAPES,
    TAG_KEYS,
    family_problem,
    generate_family,
    with_settings,
)
from guardband.safety.limits import met_every_limit

#: Index 8k has shape class k and dimension 2 + k (index % 7, 2 + (index // 7) % 7):
#: seven problems that cover every class and every dimension.
COVERING = tuple(8 * k for k in range(7))


def _slack(n: int) -> float:
    """Monte Carlo slack on a share estimated from n points: 4 standard errors at p = 1/2."""
    return 4.0 * 0.5 / math.sqrt(n)


def _covering():
    return map_jobs(family_problem, COVERING, 2)


@pytest.fixture(scope="module")
def covering():
    return _covering()


def _sample(problem, n: int, seed: int) -> np.ndarray:
    return problem.protocol.design_space().sample(n, rng=np.random.default_rng(seed))


def test_family_is_deterministic_for_a_seed(covering):
    # generated again in this process (the fixture drew it on a worker process)
    a, b = covering[1], family_problem(COVERING[1], seed=0)
    assert a.protocol_dict == b.protocol_dict
    assert (a.optimum, a.optimum_x, a.noise, a.tags) == (b.optimum, b.optimum_x, b.noise, b.tags)
    X = _sample(a, 50, seed=1)
    ya, yb = a.evaluate(X), b.evaluate(X)
    assert all(np.array_equal(ya[r], yb[r]) for r in ya)
    # another family seed draws another problem
    assert family_problem(COVERING[1], seed=1).protocol_dict != a.protocol_dict


def test_generate_family_gives_problems_0_to_n_minus_1(covering):
    family = generate_family(2, 0, workers=2)
    assert [p.name for p in family] == ["family-s0-000", "family-s0-001"]
    assert family[0].protocol_dict == covering[0].protocol_dict
    assert family[0].optimum == covering[0].optimum


def test_default_family_size_and_layout_cover_every_class_and_dimension():
    assert FAMILY_SIZE >= 100
    layout = {(SHAPES[i % len(SHAPES)], DIMENSIONS[(i // len(SHAPES)) % len(DIMENSIONS)])
              for i in range(FAMILY_SIZE)}
    assert {s for s, _ in layout} == set(SHAPES)
    assert {d for _, d in layout} == set(range(2, 9))


def test_covering_problems_have_every_class_and_dimension(covering):
    assert {p.tags["shape"] for p in covering} == set(SHAPES)
    assert {p.tags["dimension"] for p in covering} == set(range(2, 9))
    for p in covering:
        assert set(TAG_KEYS) <= set(p.tags)
        assert len(p.protocol.factors) == p.tags["dimension"]
        assert p.tags["shape"] == p.tags["shapes"].split("+")[0]
        assert len(p.protocol.limits) == p.tags["n_limits"]


def test_every_protocol_validates_and_its_space_is_not_empty(covering):
    for p in covering:
        protocol = parse_protocol(p.protocol_dict, source=p.name)
        assert not protocol.design_space().check().empty
        assert protocol.screen.threshold == 0.95
        # planner settings stay at their defaults
        assert protocol.batch.model_dump() == parse_protocol(
            {**p.protocol_dict, "batch": {}}).batch.model_dump()
        if p.tags["domain"] != "box":
            assert protocol.mixture is not None


def test_stated_optimum_meets_every_limit_and_touches_one(covering):
    for p in covering:
        protocol = p.protocol
        x = np.array(p.optimum_x)[None, :]
        assert np.asarray(protocol.design_space().contains(x))[0]
        y = p.evaluate(x)
        assert met_every_limit(protocol, y)[0], p.name
        assert y[protocol.objective.name][0] == pytest.approx(p.optimum, rel=1e-12, abs=1e-12)
        # the best feasible region touches a limit: some limit is near its bound
        X = _sample(p, 4000, seed=3)
        Y = p.evaluate(X)
        gaps = []
        for lim in protocol.limits:
            spread = np.ptp(Y[lim.name])
            for bound, sgn in ((lim.upper, 1.0), (lim.lower, -1.0)):
                if bound is not None:
                    gaps.append(sgn * (bound - y[lim.name][0]) / spread)
        # FAMILY_ACTIVE_TOL is relative to the 1%-99% quantile range; ptp is wider
        assert min(gaps) <= FAMILY_ACTIVE_TOL, p.name


def test_no_sampled_feasible_point_beats_the_optimum(covering):
    # an independent sample (seed 12345, not the one locate_optimum used)
    for p in covering:
        protocol = p.protocol
        X = _sample(p, 30_000, seed=12345)
        Y = p.evaluate(X)
        ok = met_every_limit(protocol, Y)
        s = -1.0 if protocol.maximize else 1.0
        best = np.min(s * Y[protocol.objective.name][ok])
        # tolerance: 1e-6 of the objective's range (SLSQP polishes to ftol 1e-12)
        assert best >= s * p.optimum - 1e-6 * p.tags["objective_range"], p.name


def test_feasible_shares_are_in_range(covering):
    n = 20_000
    for p in covering:
        Y = p.evaluate(_sample(p, n, seed=11))
        share = met_every_limit(p.protocol, Y).mean()
        lo, hi = FAMILY_FEASIBLE_SHARE
        assert lo - _slack(n) <= share <= hi + _slack(n), (p.name, share)
        assert abs(share - p.tags["feasible_share"]) <= 2 * _slack(4000)


def test_a_starting_box_is_mostly_feasible(covering):
    boxes = [p for p in covering if p.tags["start"] == "safe box"]
    assert boxes, "no covering problem starts in a box; pick other indices"
    for p in boxes:
        protocol = p.protocol
        A, b = protocol.start_rows()[:2]
        X = protocol.design_space().add_inequalities(A, b).sample(2000, rng=np.random.default_rng(5))
        share = met_every_limit(protocol, p.evaluate(X)).mean()
        assert share >= FAMILY_START_BOX_SHARE - _slack(2000), (p.name, share)


def test_noise_is_a_stated_share_of_each_range(covering):
    for p in covering:
        share = p.tags["noise"]
        assert share in FAMILY_NOISE_SHARES
        protocol = p.protocol
        Y = p.evaluate(_sample(p, 4000, seed=2))
        for r in protocol.response_names:
            q = np.quantile(Y[r], [0.01, 0.99])
            # the same 1%-99% range from another sample of 4000 points: within 10%
            assert p.noise[r] == pytest.approx(share * (q[1] - q[0]), rel=0.1, abs=1e-12)
        judged = {lim.judged_on for lim in protocol.limits}
        assert judged == {p.tags["judged_on"]}
        if share == 0:
            assert judged == {"measurement"}
        stated = [protocol.objective.measurement_sd] + [lim.measurement_sd for lim in protocol.limits]
        assert all((v is not None) == p.tags["sd_stated"] for v in stated)


def test_with_settings_replaces_only_the_benchmark_options():
    p = family_problem(1, 0)
    q = with_settings(p, threshold=0.8, batch=4, pool=300, refine=0)
    protocol = q.protocol
    assert protocol.screen.threshold == 0.8
    assert all(lim.probability == 0.8 for lim in protocol.limits)
    assert (protocol.batch.size, protocol.batch.pool, protocol.batch.refine) == (4, 300, 0)
    assert p.protocol.screen.threshold == 0.95  # the original is not modified
    assert q.optimum == p.optimum and q.tags == p.tags


# ------------------------------------------------------------- benchmark
def _calibration_module():
    name = "calibration_benchmark"
    if name not in sys.modules:
        path = Path(__file__).resolve().parents[1] / "benchmarks" / "calibration.py"
        spec = importlib.util.spec_from_file_location(name, path)
        module = importlib.util.module_from_spec(spec)
        sys.modules[name] = module  # its dataclasses look their module up here
        spec.loader.exec_module(module)
    return sys.modules[name]


def test_clopper_pearson_matches_the_closed_form_at_zero_and_all():
    # Clopper & Pearson (1934), Biometrika 26:404-413: with k = 0 the upper
    # limit solves (1 - p)^n = alpha/2, so p = 1 - 0.025^(1/n); with k = n the
    # lower limit is 0.025^(1/n).
    cal = _calibration_module()
    lo, hi = cal.clopper_pearson(0, 10)
    assert lo == pytest.approx(0.0, abs=1e-12)
    assert hi == pytest.approx(1 - 0.025 ** (1 / 10), rel=1e-9)
    lo, hi = cal.clopper_pearson(20, 20)
    assert lo == pytest.approx(0.025 ** (1 / 20), rel=1e-9)
    assert math.isnan(cal.clopper_pearson(0, 0)[0])


@pytest.mark.slow
def test_a_tiny_benchmark_run_gives_well_formed_rows():
    cal = _calibration_module()
    p = family_problem(0, 0)
    jobs = [cal.Job(0, with_settings(p, threshold=t, batch=b, pool=200, refine=0), b, t, 0, 4)
            for b, t in ((1, 0.9), (2, 0.95))]
    campaigns = [cal.run_job(j) for j in jobs]
    for job, c in zip(jobs, campaigns):
        rows = c["rows"]
        assert len(rows) == 4 or c["stalled"]
        assert [r["run"] for r in rows] == list(range(1, len(rows) + 1))
        assert [r["step"] for r in rows] == [(k // job.batch) + 1 for k in range(len(rows))]
        for r in rows:
            assert set(cal.RUN_COLUMNS) - {"label"} <= set(r)
            assert job.threshold <= r["promised"] <= 1.0  # a proposal passed the screen
            assert isinstance(r["met_true"], bool) and r["shape"] == "half-space"
        assert math.isfinite(c["gap_pct"]) and c["gap_pct"] >= -1e-9
    summary = cal.summarize(campaigns, "test")
    overall = [r for r in summary if r["group"] == "all"]
    assert len(overall) == 2
    for r, c in zip(overall, campaigns):
        assert r["runs"] == len(c["rows"])
        assert r["broken"] == sum(not x["met_true"] for x in c["rows"])
        assert r["ci_low"] <= r["broken_share"] <= r["ci_high"]


def test_a_family_name_is_read_back_to_its_index_and_seed():
    from guardband.planner.simulation.family import family_index, family_name

    assert family_name(33, 1) == "family-s1-033"
    assert family_index("family-s1-033") == (33, 1)
    assert family_index(family_name(1234, 0)) == (1234, 0)
    assert family_index("coating") is None and family_index("family-s1-033x") is None
