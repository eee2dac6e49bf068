"""Shared fixtures for the spanwatch tests."""

from __future__ import annotations

from pathlib import Path

import pytest

# --- physics and config test fixtures (example line) ----------------------------------------
# Used by test_config.py and test_physics_runout.py. Other fixtures go in their own section below.

REPO = Path(__file__).resolve().parents[1]
EXAMPLE_CONFIG = REPO / "config" / "quillmere-q2.toml"


@pytest.fixture(scope="session")
def example_config_path() -> Path:
    """Path of the example line configuration shipped in config/."""
    return EXAMPLE_CONFIG


@pytest.fixture(scope="session")
def example_line():
    """The derived line of the example configuration (monitor.line.load_line)."""
    from monitor.line import load_line

    return load_line(EXAMPLE_CONFIG)


# --- end of physics and config test fixtures ------------------------------------------------
