"""Shared test fixtures: paths to the example protocols and helpers."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:  # allow running the tests without installing
    sys.path.insert(0, str(ROOT))

PROTOCOLS = ROOT / "protocols"


@pytest.fixture
def tablet_path() -> Path:
    return PROTOCOLS / "tablet_blend.toml"


@pytest.fixture
def dose_path() -> Path:
    return PROTOCOLS / "dose_combination.toml"
