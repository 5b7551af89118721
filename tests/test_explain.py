"""Each pick of a batch: its value given the earlier picks, and a one-line reason."""

import numpy as np
import pytest

from guardband.planner.inputs.protocol import load_protocol
from guardband.planner.inputs.runs import read_runs
from guardband.planner.step import plan_step

from conftest import PROTOCOLS


@pytest.fixture(scope="module")
def tablet_batch():
    p = load_protocol(PROTOCOLS / "tablet_blend.toml")
    runs = read_runs(PROTOCOLS / "tablet_blend_runs.csv", p)
    return p, plan_step(p, runs, seed=6, pool_size=500, count=3, explain=False)


def test_the_first_pick_is_valued_on_the_real_models(tablet_batch):
    _, result = tablet_batch
    first = result.proposals[0]
    for rule, v in first.values.items():
        g = first.given_earlier[rule]
        assert (g is None and v is None) or g == pytest.approx(v, rel=1e-12, abs=0), rule
    assert "on the models fitted to the runs" in first.reason


def test_the_second_pick_is_valued_on_the_model_conditioned_on_the_first(tablet_batch):
    # Reference: conditioning the GP on one more observation and predicting
    # again (GaussianProcess.condition, the block Cholesky update of the
    # posterior in Rasmussen & Williams 2006, eqs. 2.23-2.24), with the
    # first pick's fantasy at its posterior mean ("kriging believer").
    p, result = tablet_batch
    assert len(result.proposals) >= 2, result.messages
    first, second = result.proposals[:2]
    gp = result.fitted[p.objective.name]
    u1, u2 = result.unit(first.x[None, :]), result.unit(second.x[None, :])
    conditioned = gp.condition(u1, np.array([first.mean]))
    mu, sd = conditioned.predict(u2)
    assert second.given_earlier["mean"] == pytest.approx(float(mu[0]), rel=1e-9)
    kappa = p.ranking.kappa
    sign = 1.0 if p.maximize else -1.0
    assert second.given_earlier["bound"] == pytest.approx(float(mu[0] + sign * kappa * sd[0]), rel=1e-9)
    assert "1 earlier pick(s)" in second.reason and "batch separation" in second.reason


def test_every_pick_has_a_reason_in_the_record(tablet_batch):
    _, result = tablet_batch
    for d in result.proposal_dicts():
        assert d["reason"] and set(d["given_earlier"]) == {"ei", "pi", "bound", "mean"}


@pytest.mark.parametrize("example", ["tablet_blend", "dose_combination"])
def test_the_extras_change_neither_table(example):
    # the rule comparison and the price of the threshold only read the step (replay leaves them out)
    p = load_protocol(PROTOCOLS / f"{example}.toml")
    runs = read_runs(PROTOCOLS / f"{example}_runs.csv", p)
    with_extras = plan_step(p, runs, seed=5, pool_size=400, count=2)
    without = plan_step(p, runs, seed=5, pool_size=400, count=2, explain=False)
    assert with_extras.threshold_price and not without.threshold_price
    assert with_extras.proposal_dicts() == without.proposal_dicts()
    assert with_extras.pool.tobytes() == without.pool.tobytes()
    assert list(with_extras.screen.detail) == list(without.screen.detail)
    assert with_extras.screen.P.tobytes() == without.screen.P.tobytes()
    assert with_extras.messages == without.messages
