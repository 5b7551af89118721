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


def _screened(U, survives, reason, P, names=("a", "b")):
    from types import SimpleNamespace

    result = SimpleNamespace(survives=np.asarray(survives), reason=np.asarray(reason, dtype=object),
                             P=np.asarray(P, dtype=float), limit_names=names)
    return SimpleNamespace(U=np.asarray(U, dtype=float), result=result)


def test_a_note_says_why_no_pick_is_likely_to_beat_the_best_run():
    from guardband.planner.step.explain import NEAREST, UNLIKELY, unlikely_to_improve

    # 60 candidates on a line from the best run at 0: the 50 nearest are the first 50 (by hand);
    # 30 of them short of a limit (b the lowest in 20 of those), 15 beyond the span, 5 pass
    n = 60
    U = np.column_stack([np.arange(n) / n, np.zeros(n)])
    reason = ["limit-probability"] * 30 + ["beyond-tested-span"] * 15 + [""] * 5 + ["forbidden-region"] * 10
    P = [[0.9, 0.5]] * 20 + [[0.4, 0.9]] * 10 + [[1.0, 1.0]] * 30
    pool = _screened(U, [r == "" for r in reason], reason, P)
    assert NEAREST == 50
    note = " ".join(unlikely_to_improve(pool, 45, 1e-12, np.zeros(2), "R09 (85.75)"))
    assert "beat the best run R09 (85.75)" in note and "chance of a better result is 1e-12" in note
    assert "Of the 50 candidates nearest that run, 5 pass, 30 limit-probability" in note
    assert "b the lowest in 20" in note and "15 beyond-tested-span" in note
    assert "forbidden-region" not in note  # the 10 farthest candidates are not among the nearest
    # a first pick with a fair chance, or none at all: no note
    assert unlikely_to_improve(pool, 45, UNLIKELY, np.zeros(2), "R09") == []
    assert unlikely_to_improve(pool, 45, float("nan"), np.zeros(2), "R09") == []


def test_the_tablet_example_says_why_nothing_is_likely_to_beat_its_best_run(tablet_batch):
    # the demo's first pick has a chance of about 1e-12 of beating run R09: the plan says why
    notes = [m for m in tablet_batch[1].messages if m.startswith("no candidate that passes the screen")]
    assert len(notes) == 1 and "best run R09" in notes[0] and "friability the lowest" in notes[0]


def test_when_nothing_passes_a_note_names_the_nearest_miss_and_its_weakest_limit():
    from guardband.planner.step.explain import closest_miss

    # three candidates: one outside the space (highest joint, must be ignored), two inside; the
    # nearest inside has joint 0.82, limit b at 0.83 (0.12 short of 0.95) and a at 0.99 (above its 0.9)
    U = np.zeros((3, 2))
    reason = ["outside-design-space", "limit-probability", "limit-probability"]
    P = [[1.0, 1.0], [0.99, 0.83], [0.5, 0.6]]
    pool = _screened(U, [False] * 3, reason, P)
    pool.result.joint = np.array([0.99, 0.82, 0.1])
    note = " ".join(closest_miss(pool, [0.9, 0.95], 0.9))
    assert "candidate 1 (limit-probability) with a joint figure of 0.82 against 0.9" in note
    assert "'b' is met with probability 0.83 against the 0.95 required" in note
    # every candidate outside the space: nothing to say
    outside = _screened(U, [False] * 3, ["outside-design-space"] * 3, P)
    outside.result.joint = np.zeros(3)
    assert closest_miss(outside, [0.9, 0.95], 0.9) == []
