# SPDX-License-Identifier: BSD-3-Clause
"""Crash safety: ``twinfield reduce`` killed (SIGKILL, no clean-up possible) at seeded
random moments, then allowed to finish, gives exactly the clean run's products and
astrometry table; after every kill, no product the engine would trust fails to open."""

import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

import pipeline.engine as engine
from pipeline.bench import _children
from pipeline.store import is_complete
from robust_night import (astrometry_rows, clean_work, differing_products, night_path,
                          product_files, read_datasets, same_array)

pytestmark = pytest.mark.slow

N_KILLS = 3


def _reduce_cmd(night, work):
    return [sys.executable, "-m", "pipeline.cli", "reduce", str(night), "-o", str(work)]


def _wait_for(path, proc, timeout=120.0):
    t0 = time.monotonic()
    while not path.exists():
        if proc.poll() is not None or time.monotonic() - t0 > timeout:
            return False
        time.sleep(0.05)
    return True


def _units_done(log, offset):
    """Units this run has logged as computed (the log is appended to by every run)."""
    with open(log, "rb") as fh:
        fh.seek(offset)
        return len(re.findall(rb" INFO computed ", fh.read()))


def _descendants(pid):
    """Process ids below ``pid`` (Linux /proc; empty elsewhere)."""
    out, todo = [], [pid]
    while todo:
        kids = _children(todo.pop())
        out += kids
        todo += kids
    return out


def _alive(pid):
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (OSError, IndexError):
        return False
    return state != "Z"


def _nothing_untrustworthy(work):
    """Every product file under its final name is complete and readable, and every
    product ``status`` calls current opens with all its datasets."""
    for name, path in product_files(work).items():
        assert is_complete(path), f"{name} has its final name but is incomplete"
    for row in engine.status(work):
        if row["state"] == "current":
            read_datasets(row["path"])


def test_killed_reductions_then_finished_equal_a_clean_run(tmp_path_factory, tiny_night,
                                                           tmp_path):
    clean = clean_work(tmp_path_factory, tiny_night)
    night = night_path(tmp_path_factory, tiny_night)
    work = tmp_path / "work"
    rng = np.random.default_rng(8)             # seeded kill moments
    n_units = len(engine.status(clean))
    kills, attempts, helpers_seen = 0, 0, 0
    while kills < N_KILLS and attempts < 2 * N_KILLS:
        attempts += 1
        work.mkdir(exist_ok=True)
        log = work / engine.LOG_FILE
        offset = log.stat().st_size if log.exists() else 0
        left = (sum(r["state"] != "current" for r in engine.status(work))
                if (work / engine.STATE_FILE).exists() else n_units)
        proc = subprocess.Popen(_reduce_cmd(night, work), stdout=subprocess.DEVNULL,
                                stderr=subprocess.DEVNULL)
        try:
            # Kill once this run has finished a random number (1 to half of those left)
            # of the night's units, a random fraction of a second later: the kills spread
            # over the whole graph, while a product is computed or written.
            assert _wait_for(work / engine.LOCK_FILE, proc), "reduce never took the lock"
            target = rng.integers(1, max(2, left // 2 + 1))
            while proc.poll() is None and _units_done(log, offset) < target:
                time.sleep(0.02)
            time.sleep(rng.uniform(0.0, 0.3))
            helpers = _descendants(proc.pid)
            if proc.poll() is None:
                os.kill(proc.pid, signal.SIGKILL)
                kills += 1
        finally:
            proc.wait()
        # Its helper processes end with it: none goes on writing into the work
        # directory beside the next run.
        t0 = time.monotonic()
        while any(map(_alive, helpers)) and time.monotonic() - t0 < 10:
            time.sleep(0.05)
        assert not any(map(_alive, helpers)), "a killed reduce left helper processes running"
        helpers_seen += len(helpers)
        _nothing_untrustworthy(work)
    assert kills == N_KILLS
    assert helpers_seen or not Path("/proc/self/task").exists()

    done = subprocess.run(_reduce_cmd(night, work), capture_output=True, text=True)
    assert done.returncode == 0, done.stdout + done.stderr
    assert "0 failed" in done.stdout
    assert not list(work.glob("*/.*.tmp")) + list(work.glob("*/*/.*.tmp")), \
        "temporary files of killed runs were left"
    assert not (work / engine.LOCK_FILE).exists()
    # Products lost or different from the clean run: none (same keys, same datasets).
    assert differing_products(work, clean) == []
    assert {r["state"] for r in engine.status(work)} == {"current"}
    assert same_array(astrometry_rows(work), astrometry_rows(clean))
