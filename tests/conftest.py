# SPDX-License-Identifier: BSD-3-Clause
"""Shared fixtures: seeded random generators, the instrument model, simulated nights."""

import numpy as np
import pytest

from pipeline.instrument import load_instrument


@pytest.fixture
def rng():
    """A seeded generator; every test that draws noise uses it."""
    return np.random.default_rng(20261202)


@pytest.fixture(scope="session")
def instrument():
    return load_instrument()


@pytest.fixture(scope="session")
def tiny_night(tmp_path_factory):
    """The `tiny` scenario simulated once per test session (seed 3)."""
    from pipeline.simulate import simulate_night
    night = tmp_path_factory.mktemp("tiny_night")
    simulate_night(night, scenario="tiny", seed=3)
    return night
