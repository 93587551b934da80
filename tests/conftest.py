"""Shared test fixtures: a seeded random generator and a repeatable hypothesis profile."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import settings

# the same examples on every run and machine, and no deadline on slow CI cores
settings.register_profile("repeatable", derandomize=True, deadline=None)
settings.load_profile("repeatable")


@pytest.fixture
def rng() -> np.random.Generator:
    """A seeded generator, so that every random input is the same on every run."""
    return np.random.default_rng(20261202)
