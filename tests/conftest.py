"""Shared test fixtures: paths to the example protocols and helpers."""

from __future__ import annotations

from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

PROTOCOLS = ROOT / "protocols"


@pytest.fixture
def tablet_path() -> Path:
    return PROTOCOLS / "tablet_blend.toml"


@pytest.fixture
def dose_path() -> Path:
    return PROTOCOLS / "dose_combination.toml"


def unit_square_protocol(limit: dict, *, title: str = "unit square", **sections) -> dict:
    """Protocol data: factors x1, x2 on [0, 1], objective y (maximised), one limit.

    ``sections`` add or replace top-level sections (``screen``, ``batch``,
    ``objective``, ``seed``, ...).
    """
    return {
        "study": {"title": title, "version": "1", "author": "tests"},
        "factors": [{"name": "x1", "kind": "continuous", "lower": 0.0, "upper": 1.0},
                    {"name": "x2", "kind": "continuous", "lower": 0.0, "upper": 1.0}],
        "objective": {"name": "y", "direction": "maximize"},
        "limits": [limit],
        **sections,
    }


def with_sections(protocol, **sections):
    """A copy of a validated protocol with some of its tables' keys replaced
    (``with_sections(p, screen={"threshold": 0.9})``)."""
    from guardband.planner.inputs.protocol import parse_protocol

    data = protocol.model_dump(mode="python")
    for key, update in sections.items():
        data[key] = {**(data.get(key) or {}), **update}
    return parse_protocol(data)


def rate_protocol(**sections) -> dict:
    """Protocol data: two agents on discrete doses, a response rate as the objective and a DLT
    rate as the limit, both binomial (counts). ``sections`` replace top-level sections."""
    return {
        "study": {"title": "response rate (test)", "version": "1", "author": "test", "kind": "dose"},
        "factors": [{"name": "dose_a", "kind": "discrete", "levels": [0, 5, 10, 20, 40]},
                    {"name": "dose_b", "kind": "discrete", "levels": [0, 1, 2, 4]}],
        "objective": {"name": "response_rate", "direction": "maximize", "kind": "binomial",
                      "events": "responders", "subjects": "treated"},
        "limits": [{"name": "dlt_rate", "kind": "binomial", "events": "dlt_events", "subjects": "dlt_subjects",
                    "upper": 0.3, "probability": 0.8}],
        "screen": {"threshold": 0.8, "min_runs": 3, "max_step": 0.3},
        "escalation": {"no_skipping": True, "cohort_size": 6},
        "ranking": {"rule": "ei"},
        **sections,
    }


def gramacy_batch_protocol(*, with_limits: bool = True, **batch):
    """Gramacy's protocol with a small batch of 4 (pool 600, no refinement), ``batch`` overriding.

    Without limits the screen is the hard rules alone, which no fantasy changes.
    """
    import copy

    from guardband.planner.inputs.protocol import parse_protocol
    from guardband.planner.simulation.problems import get_problem

    data = copy.deepcopy(get_problem("gramacy").protocol_dict)
    data["batch"] = {**data.get("batch", {}), "size": 4, "pool": 600, "refine": 0, **batch}
    if not with_limits:
        data["limits"] = []
    return parse_protocol(data, source="gramacy, test settings")


def gramacy_batch_runs():
    """Eight starting runs of Gramacy's problem (seed 3), measured without noise."""
    import numpy as np

    from guardband.planner.simulation.loop import runs_table_from_arrays, start_runs
    from guardband.planner.simulation.problems import get_problem

    p = gramacy_batch_protocol()
    X = start_runs(p, 8, rng=np.random.default_rng(3))
    return runs_table_from_arrays(p, X, get_problem("gramacy").evaluate(X))
