"""Shared test set-up: the tests/ folder is importable (rooms, browser and LV2 host helpers)."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))

import pytest


@pytest.fixture(scope="session")
def bundle() -> Path:
    """The LV2 bundle, built once for all plugin tests (they skip without the LV2 tools)."""
    from lv2host import support

    return support.bundle()
