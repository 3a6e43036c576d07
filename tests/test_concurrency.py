# SPDX-License-Identifier: BSD-3-Clause
"""Concurrent runs: while one ``twinfield reduce`` works in a directory, a second
``reduce`` (or ``rerun``) on it refuses at once with exit code 4 and a one-line message
naming the directory and the running process; the first run's products are unharmed."""

import subprocess
import sys
import time

import pytest

import pipeline.engine as engine
from pipeline.cli import main
from robust_night import (astrometry_rows, clean_work, copy_work, differing_products,
                          night_path, read_datasets, same_array)

pytestmark = pytest.mark.slow


def test_second_reduce_refuses_and_corrupts_nothing(tmp_path_factory, tiny_night, tmp_path,
                                                    capsys):
    clean = clean_work(tmp_path_factory, tiny_night)
    night = night_path(tmp_path_factory, tiny_night)
    work = copy_work(clean, tmp_path / "work")
    lock = work / engine.LOCK_FILE
    # The first run recomputes the astrometry table and the report (several seconds).
    first = subprocess.Popen([sys.executable, "-m", "pipeline.cli", "reduce", str(night),
                              "-o", str(work), "--force", "tables"],
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        t0 = time.monotonic()
        while not lock.exists():
            assert first.poll() is None and time.monotonic() - t0 < 120, "no lock taken"
            time.sleep(0.05)
        capsys.readouterr()
        for argv in (["reduce", str(night), "-o", str(work)], ["rerun", str(work), "tables"]):
            assert main(argv) == 4                       # docs/cli.md: work directory locked
            err = capsys.readouterr().err
            assert err.count("\n") == 1 and "Traceback" not in err
            assert f"another reduction (pid {first.pid} on " in err and str(work) in err
        # status does not need the lock, and what it calls current opens.
        for row in engine.status(work):
            if row["state"] == "current":
                read_datasets(row["path"])
        assert first.poll() is None, "the first run ended before the checks: not a race"
    finally:
        out, err = first.communicate(timeout=600)
    assert first.returncode == 0, out + err
    assert not lock.exists()
    # The forced recomputation gives the same products (same keys, same datasets).
    assert differing_products(work, clean) == []
    assert same_array(astrometry_rows(work), astrometry_rows(clean))
