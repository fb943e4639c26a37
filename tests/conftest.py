"""Shared fixtures: the shipped demo coil and a seeded random generator."""

from __future__ import annotations

import numpy as np
import pytest

from nl_unwarp.coil import CoilModel
from nl_unwarp.demo import demo_coil_path
from nl_unwarp.io.coilfile import load_coil

#: Seed of the ``rng`` fixture (any fixed value; tests must not depend on which).
RNG_SEED = 20261202


@pytest.fixture
def demo_coil() -> CoilModel:
    """The fictional demo gradient system of ``nl_unwarp/data``, loaded afresh (tests may modify it)."""
    return load_coil(demo_coil_path())


@pytest.fixture
def rng() -> np.random.Generator:
    """A freshly seeded generator for each test (reproducible draws)."""
    return np.random.default_rng(RNG_SEED)
