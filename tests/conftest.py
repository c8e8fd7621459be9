"""Shared fixtures: a seeded random generator, and (in tests/servers.py) real mosquitto and PostgreSQL servers."""

from __future__ import annotations

import numpy as np
import pytest

pytest_plugins = ["tests.servers"]

SEED = 20261202


@pytest.fixture
def rng() -> np.random.Generator:
    """One seeded generator per test, so every test is reproducible on its own."""
    return np.random.default_rng(SEED)
