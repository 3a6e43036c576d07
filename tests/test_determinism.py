# SPDX-License-Identifier: BSD-3-Clause
"""Determinism: the same night and configuration reduced from scratch a second time, with
the processes scheduler instead of threads, gives the same product keys, bit-identical
product datasets and the same astrometry table (every random draw in the pipeline is
seeded from the unit it belongs to); so does recomputing the exposure averages and what
follows on a dask.distributed worker."""

import pytest

import pipeline.engine as engine
import recipes
from pipeline.engine import reduce
from robust_night import (astrometry_rows, clean_work, copy_work, differing_products,
                          night_path, product_files, same_array)

pytestmark = pytest.mark.slow


def test_processes_scheduler_equals_threads(tmp_path_factory, tiny_night, tmp_path,
                                           monkeypatch):
    clean = clean_work(tmp_path_factory, tiny_night)            # threads, first run
    # The report (pictures of the products compared here) is left out to save time.
    monkeypatch.setattr(engine, "_stages",
                        lambda: [s for s in recipes.STAGES if s.name not in recipes.DRAWING])
    night = night_path(tmp_path_factory, tiny_night)
    summary = reduce(night, tmp_path / "work", scheduler="processes", workers=2,
                     progress=False)
    assert summary.exit_code == 0 and not summary.reused, summary.text()
    assert set(product_files(tmp_path / "work")) == {
        name for name in product_files(clean) if name[0] not in recipes.DRAWING}
    assert differing_products(tmp_path / "work", clean, skip=recipes.DRAWING) == []
    table = astrometry_rows(tmp_path / "work")
    assert len(table) == 1 and same_array(table, astrometry_rows(clean))


def test_distributed_scheduler_equals_threads(tmp_path_factory, tiny_night, tmp_path,
                                             monkeypatch):
    """The per-exposure averaging and everything after it recomputed on a dask.distributed
    worker process (seeds and products travel by pickle): the same datasets."""
    distributed = pytest.importorskip("distributed")
    clean = clean_work(tmp_path_factory, tiny_night)
    night = night_path(tmp_path_factory, tiny_night)
    work = copy_work(clean, tmp_path / "work")
    monkeypatch.setattr(engine, "_stages",
                        lambda: [s for s in recipes.STAGES if s.name not in recipes.DRAWING])
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=True,
                                  dashboard_address=":0") as cluster:
        summary = reduce(night, work, scheduler=cluster.scheduler_address, force=("average",),
                         progress=False)
    assert summary.exit_code == 0, summary.text()
    assert {s for s, _ in summary.computed} == {"average", "calibrate", "merge", "binary",
                                                "tables"}
    assert differing_products(work, clean, skip=recipes.DRAWING) == []
    assert same_array(astrometry_rows(work), astrometry_rows(clean))
