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
