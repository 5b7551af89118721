"""Jobs on worker processes give the same results, in order, as in turn."""

from __future__ import annotations

import numpy as np
import pytest

from guardband.planner.models import parallel
from guardband.planner.step import fitting
from guardband.planner.simulation import runs_table_from_arrays
from guardband.planner.inputs.protocol import parse_protocol
from guardband.planner.step import plan_step


def _square(x):
    return x * x


def _fail_on_three(x):
    if x == 3:
        raise ValueError("job three failed")
    return x


def test_map_jobs_keeps_order_and_matches_serial():
    jobs = list(range(7))
    assert parallel.map_jobs(_square, jobs, 2) == [x * x for x in jobs]
    assert parallel.map_jobs(_square, jobs, 1) == [x * x for x in jobs]
    assert parallel.map_jobs(_square, [], 2) == []


def test_map_jobs_raises_a_job_error():
    with pytest.raises(ValueError, match="job three failed"):
        parallel.map_jobs(_fail_on_three, range(5), 2)


def _w1_like(n: int):
    protocol = parse_protocol({
        "seed": 3,
        "study": {"title": "parallel fits", "version": "1", "author": "tests"},
        "factors": [{"name": f"x{i}", "kind": "continuous", "lower": 0.0, "upper": 1.0} for i in range(3)],
        "objective": {"name": "y", "direction": "minimize"},
        "limits": [{"name": "c1", "upper": 1.0, "probability": 0.95},
                   {"name": "c2", "upper": 0.8, "probability": 0.95}],
        "screen": {"threshold": 0.9, "min_runs": 5},
        "batch": {"size": 3, "pool": 500, "refine": 1},
    })
    rng = np.random.default_rng(0)
    X = rng.random((n, 3))
    Y = {"y": np.sum((X - 0.4) ** 2, axis=1), "c1": X[:, 0] + X[:, 1] ** 2, "c2": 0.6 * X[:, 2] + 0.1 * X[:, 0]}
    return protocol, runs_table_from_arrays(protocol, X, Y)


def test_plan_step_fits_on_processes_give_the_same_plan(monkeypatch):
    protocol, runs = _w1_like(40)
    monkeypatch.setattr(fitting, "PARALLEL_FIT_MIN_RUNS", 10**9)  # in turn
    serial = plan_step(protocol, runs, seed=5)
    monkeypatch.setattr(fitting, "PARALLEL_FIT_MIN_RUNS", 1)  # on processes
    monkeypatch.setattr(fitting, "FIT_WORKERS", 2)
    forked = plan_step(protocol, runs, seed=5)
    assert [m.hyperparameters for m in serial.models] == [m.hyperparameters for m in forked.models]
    np.testing.assert_array_equal(np.array([p.x for p in serial.proposals]), np.array([p.x for p in forked.proposals]))
    assert serial.record_body() == forked.record_body()
