"""Runs in progress (factors set, nothing measured): already chosen, never the incumbent."""

import numpy as np
import pytest

from guardband.planner.inputs.protocol import load_protocol
from guardband.planner.inputs.runs import read_runs
from guardband.planner.simulation import runs_table_from_arrays
from guardband.planner.step import plan_step
from guardband.planner.step.batch import MIN_SEPARATION
from guardband.safety.screen import step_distance

from conftest import PROTOCOLS

POOL = 400


def _with_rows(protocol, runs, X_new, Y_new=None):
    """The runs plus rows X_new (responses NaN unless given)."""
    X = np.vstack([runs.X, X_new])
    Y = {}
    for r in protocol.response_names:
        extra = np.full(X_new.shape[0], np.nan) if Y_new is None else np.asarray(Y_new[r], float)
        Y[r] = np.concatenate([runs.Y[r], extra])
    return runs_table_from_arrays(protocol, X, Y)


@pytest.fixture(scope="module")
def tablet():
    p = load_protocol(PROTOCOLS / "tablet_blend.toml")
    runs = read_runs(PROTOCOLS / "tablet_blend_runs.csv", p)
    return p, runs_table_from_arrays(p, runs.X, runs.Y)


@pytest.fixture(scope="module")
def first_and_second(tablet):
    """A plan, then the same plan with its first two proposals in progress."""
    p, runs = tablet
    first = plan_step(p, runs, seed=3, pool_size=POOL, count=3, explain=False)
    busy = np.array([q.x for q in first.proposals[:2]])
    again = plan_step(p, _with_rows(p, runs, busy), seed=3, pool_size=POOL, count=3, explain=False)
    return first, busy, again


def test_in_progress_runs_are_not_proposed_again_nor_crowded(tablet, first_and_second):
    p, _ = tablet
    first, busy, again = first_and_second
    assert len(first.proposals) >= 2 and again.proposals, again.messages
    assert again.n_in_progress == 2 and first.n_in_progress == 0
    U_busy = again.unit(busy)
    U_new = again.unit(np.array([q.x for q in again.proposals]))
    # the batch separation of planner/step/batch.py, in the screen's own distance
    assert np.all(step_distance(U_new, U_busy) >= MIN_SEPARATION)
    assert any("in progress" in m and "shaped the batch" in m for m in again.messages)
    assert again.record_body()["n_in_progress"] == 2


def test_the_incumbent_ignores_in_progress_runs(tablet, first_and_second):
    first, _, again = first_and_second
    assert again.incumbent == first.incumbent


def test_an_in_progress_run_at_the_best_run_never_becomes_incumbent_or_repeated(tablet):
    p, runs = tablet
    base = plan_step(p, runs, seed=1, pool_size=POOL, count=2, explain=False)
    top = base.proposals[0].x[None, :]
    with_busy = plan_step(p, _with_rows(p, runs, top), seed=1, pool_size=POOL, count=2, explain=False)
    assert with_busy.incumbent == base.incumbent
    U = with_busy.unit(np.array([q.x for q in with_busy.proposals]))
    assert np.all(step_distance(U, with_busy.unit(top)) >= MIN_SEPARATION)


def test_a_partly_measured_run_is_data_for_the_responses_present(tablet):
    p, runs = tablet
    # an extra run with only the objective measured
    x = runs.X[:1].copy()
    Y = {r: [np.nan] for r in p.response_names}
    Y[p.objective.name] = [float(runs.Y[p.objective.name][0]) + 1.0]
    part = _with_rows(p, runs, x, Y)
    result = plan_step(p, part, seed=2, pool_size=200, count=1, explain=False)
    n_by_response = {m.response: m.n_runs for m in result.models}
    assert n_by_response[p.objective.name] == runs.n_runs + 1
    for lim in p.limits:
        assert n_by_response[lim.name] == runs.n_runs
    assert result.n_in_progress == 0


def test_no_rule_picks_a_run_already_in_progress(tablet):
    """Each rule's first pick (the rule comparison) keeps the batch separation from runs in progress."""
    p, runs = tablet
    first = plan_step(p, runs, seed=3, pool_size=POOL, count=1)
    busy = np.array([e["x"][n] for e in first.rule_picks if e["candidate"] is not None
                     for n in p.factor_names]).reshape(-1, len(p.factor_names))
    assert busy.shape[0] >= 1
    again = plan_step(p, _with_rows(p, runs, busy), seed=3, pool_size=POOL, count=1)
    picked = [e for e in again.rule_picks if e["candidate"] is not None]
    assert picked
    U_busy = again.unit(busy)
    U_pick = again.unit(np.array([[e["x"][n] for n in p.factor_names] for e in picked]))
    assert np.all(step_distance(U_pick, U_busy) >= MIN_SEPARATION)
