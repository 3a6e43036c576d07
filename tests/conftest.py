# SPDX-License-Identifier: BSD-3-Clause
"""Shared fixtures: seeded random generators, the instrument model, simulated nights."""

import numpy as np
import pytest

from pipeline.instrument import load_instrument


@pytest.fixture(autouse=True)
def _no_malloc_trim_leak():
    """A dask nanny writes its workers' MALLOC_TRIM_THRESHOLD_ into the environment of the
    process that starts it (this one, for a LocalCluster); helper processes started by
    later tests would inherit it and run at about half speed. Undo that after each test."""
    import os
    before = os.environ.get("MALLOC_TRIM_THRESHOLD_")
    yield
    if before is None:
        os.environ.pop("MALLOC_TRIM_THRESHOLD_", None)


@pytest.fixture(scope="session", autouse=True)
def _session_cache_dir(tmp_path_factory):
    """The suite keeps astropy's Earth-orientation table (pipeline.earth_orientation) in a
    directory of its own, not in the user's cache; processes it starts inherit it."""
    import os
    before = os.environ.get("TWINFIELD_CACHE_DIR")
    os.environ["TWINFIELD_CACHE_DIR"] = str(tmp_path_factory.mktemp("cache"))
    yield
    if before is None:
        os.environ.pop("TWINFIELD_CACHE_DIR", None)
    else:
        os.environ["TWINFIELD_CACHE_DIR"] = before


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


@pytest.fixture(scope="session")
def tiny_work(tiny_night, tmp_path_factory):
    """The tiny night reduced once per session through every stage (shared, read-only:
    tests that change products copy it first).

    Returns (night, work, summary)."""
    from pathlib import Path

    import recipes
    from pipeline.engine import reduce
    work = tmp_path_factory.mktemp("tiny_work")
    config = work.parent / "tiny_work_fast.toml"
    config.write_text("[binary]\nn_boot = 12\n")      # fewer bootstrap refits: speed only
    summary = reduce(tiny_night, work, stages=list(recipes.STAGES), config=[config],
                     progress=False)
    return Path(tiny_night), work, summary
