"""The tested span grows faster while the runs at its edge keep meeting the limits.

The success count of a trust region (Eriksson et al. 2019, NeurIPS, from
memory), read off the runs in the order they were made: each run beyond the
box of the earlier runs that met every limit, and itself within the limits,
doubles the span's push (up to ``screen.span_growth``); a run that broke a
limit ends the streak.
"""

from __future__ import annotations

import numpy as np
import pytest

from guardband.planner.inputs.protocol import parse_protocol
from guardband.planner.simulation import runs_table_from_arrays
from guardband.planner.simulation.problems import gramacy_protocol_dict
from guardband.planner.step.plan import prepare_step
from guardband.safety.span import span_streak


def test_runs_inside_the_box_do_not_count_and_a_break_ends_the_streak():
    U = np.array([[0.5, 0.5], [0.6, 0.5], [0.55, 0.5], [0.7, 0.6], [0.8, 0.6]])
    assert span_streak(U, [True] * 5) == 3  # rows 1, 3 and 4 extend the box; row 2 lies inside it
    assert span_streak(U, [True, True, True, False, True]) == 1  # the break at row 3 ends it
    assert span_streak(U, [True, True, True, True, False]) == 0
    assert span_streak(U[:1], [True]) == 0  # the first run that met the limits has no box to leave
    assert span_streak(np.zeros((0, 2)), []) == 0


def test_a_run_that_broke_a_limit_does_not_widen_the_box():
    U = np.array([[0.5, 0.5], [0.9, 0.9], [0.8, 0.8]])
    # row 1 broke a limit: the box stays at row 0, so row 2 extends it
    assert span_streak(U, [True, False, True]) == 1


def test_columns_limit_which_factors_count():
    U = np.array([[0.5, 0.1], [0.5, 0.9]])
    assert span_streak(U, [True, True], columns=np.array([True, False])) == 0
    assert span_streak(U, [True, True], columns=np.array([False, True])) == 1


def _prepared(growth: int, order):
    data = gramacy_protocol_dict(batch=1, rule="ei", threshold=0.9)
    data["screen"] = {**data["screen"], "span_reach": 0.25, "span_growth": growth}
    protocol = parse_protocol(data)
    # runs moving outwards along a line, every one well within both limits
    X = np.array([[0.30, 0.30], [0.32, 0.31], [0.34, 0.33], [0.37, 0.35], [0.40, 0.38], [0.44, 0.40]])[order]
    Y = {protocol.objective.name: X.sum(axis=1),
         **{lim.name: np.linspace(-0.9, -0.5, len(X)) for lim in protocol.limits}}
    assert all(lim.upper == 0.0 for lim in protocol.limits)
    runs = runs_table_from_arrays(protocol, X, Y)
    return prepare_step(protocol, runs, seed=1)


def test_the_step_doubles_the_push_per_run_of_the_streak_up_to_span_growth():
    st = _prepared(3, np.arange(6))
    ok = st.safe
    assert ok.all(), "the test's runs must meet both limits"
    assert st.ctx.rules.span_reach == pytest.approx(0.25 * 2**3)  # streak of 5, capped at 3 doublings
    assert any("doubled 3 time(s)" in m for m in st.messages)
    assert _prepared(0, np.arange(6)).ctx.rules.span_reach == pytest.approx(0.25)
    # the second run spans the whole line at once: one doubling, the later runs lie inside its box
    inwards = _prepared(3, np.array([0, 5, 1, 2, 3, 4]))
    assert inwards.ctx.rules.span_reach == pytest.approx(0.5)
