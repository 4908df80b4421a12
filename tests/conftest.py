"""Shared test fixtures: seeded rng, strict floating point, headless matplotlib."""

from __future__ import annotations

import os

import numpy as np
import pytest

os.environ.setdefault("MPLBACKEND", "agg")


@pytest.fixture
def rng() -> np.random.Generator:
    """A seeded generator, so that every test is reproducible."""
    return np.random.default_rng(20261202)


@pytest.fixture(autouse=True)
def _strict_floats():
    """Turn floating-point warnings into errors inside tests (underflow excepted)."""
    with np.errstate(all="raise", under="ignore"):
        yield
