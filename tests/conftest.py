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
