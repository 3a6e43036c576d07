# SPDX-License-Identifier: BSD-3-Clause
"""The engine on small nights: reuse, staleness, rerun, failure isolation, locking and
recovery from a killed run."""

import dataclasses
import json
import os
import platform
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from fake_stages import APART_CRASHER, CONSUMER, CRASHER, SLOW, WHERE
from pipeline.engine import (LOCK_FILE, LOG_FILE, Locked, build_plan, reduce, rerun, status,
                             unit_seconds)
from pipeline.errors import ConfigError
from pipeline.store import ProductView, is_complete
from rawfactory import small_night, write_raw
from recipes import dark, inventory

STAGES = [inventory.STAGE, dark.STAGE, CONSUMER]
DARKS = {("dark", "sci-low-joint-dit1"), ("dark", "sci-low-joint-dit2"),
         ("dark", "ft-period1ms")}
CONSUMERS = {("consumer", "sci-low-joint-dit1"), ("consumer", "sci-low-joint-dit2")}
ALL = {("inventory", "night")} | DARKS | CONSUMERS


@pytest.fixture
def night(tmp_path, rng):
    return small_night(tmp_path / "night", rng, dits=(1.0, 2.0))


def _states(work):
    return {(r["stage"], r["name"]): r["state"] for r in status(work, stages=STAGES)}


def test_second_reduce_runs_nothing(night, tmp_path):
    work = tmp_path / "work"
    first = reduce(night, work, stages=STAGES, progress=False)
    assert set(first.computed) == ALL and first.exit_code == 0
    second = reduce(night, work, stages=STAGES, progress=False)
    assert second.computed == [] and set(second.reused) == ALL
    assert set(_states(work).values()) == {"current"}
    runs = (work / LOG_FILE).read_text().split(" INFO reduce ")
    assert len(runs) == 3 and "computed dark/sci-low-joint-dit1 " in runs[1]
    # every unit's line gives its wall and CPU seconds; one thread's CPU time cannot
    # exceed its wall time (BLAS threads are 1 in the units); reading and stacking the
    # dark frames does use some
    times = re.findall(r"computed (\S+) \S+ in ([\d.]+) s \(([\d.]+) CPU s\)", runs[1])
    assert len(times) == len(ALL)
    assert all(0 <= float(cpu) <= float(wall) + 0.02 for _, wall, cpu in times)
    assert sum(float(cpu) for name, _, cpu in times if name.startswith("dark/")) > 0
    # the per-stage sums the bench reports add up the same lines
    per_stage = unit_seconds(runs[1])
    assert sum(r["units"] for r in per_stage.values()) == len(ALL)
    assert per_stage["dark"]["cpu_s"] == pytest.approx(
        sum(float(cpu) for name, _, cpu in times if name.startswith("dark/")))
    log = runs[-1]                                               # the second run's lines
    assert "computed" not in log.replace("0 product(s) computed", "") and log.count("reuse ") == 6


def test_parameter_change_makes_darks_and_dependents_stale(night, tmp_path):
    work = tmp_path / "work"
    reduce(night, work, stages=STAGES, progress=False)
    cfg = tmp_path / "more.toml"
    cfg.write_text("[dark]\nkappa = 4.0\n")
    plan = build_plan(night, work, config=[cfg], stages=STAGES)
    states = {uid: plan.state(pu) for uid, pu in plan.units.items()}
    assert {u for u, s in states.items() if s == "stale"} == DARKS | CONSUMERS
    assert states[("inventory", "night")] == "current"
    run = reduce(night, work, config=[cfg], stages=STAGES, progress=False)
    assert set(run.computed) == DARKS | CONSUMERS and run.reused == [("inventory", "night")]
    # rerun: that stage and its dependents only, with the remembered config.
    again = rerun(work, "dark", stages=STAGES, progress=False)
    assert set(again.computed) == DARKS | CONSUMERS and again.reused == [("inventory", "night")]
    assert json.loads(ProductView(plan.units[("dark", "ft-period1ms")].path)
                      .attrs["params"])["kappa"] == 4.0


def test_touching_one_dark_frame(night, tmp_path):
    work = tmp_path / "work"
    reduce(night, work, stages=STAGES, progress=False)
    p = night / "dark_2.fits"
    st = p.stat()
    os.utime(p, ns=(st.st_atime_ns, st.st_mtime_ns + 5 * 10**9))
    stale = {u for u, s in _states(work).items() if s == "stale"}
    # The file's own dark group, the FT dark (every dark reads the FT), their dependents,
    # and the inventory table (which lists the file); nothing else.
    expected = {("inventory", "night"), ("dark", "sci-low-joint-dit2"), ("dark", "ft-period1ms"),
                ("consumer", "sci-low-joint-dit2")}
    assert stale == expected
    run = reduce(night, work, stages=STAGES, progress=False)
    assert set(run.computed) == expected


def test_bad_file_fails_its_branch_only(night, tmp_path, rng):
    # A dark whose cube disagrees with its header (valid header: planned, fails at run)...
    write_raw(night / "dark_3.fits", "dark", rng=rng, dit=3.0, nframe=4,
              header_extra={"NFRAME": 6, "EXPTIME": 18.0}, mjd=61000.015)
    # ... and a truncated science file (unreadable: listed, never planned).
    data = (night / "sci1.fits").read_bytes()
    (night / "sci1.fits").write_bytes(data[:5000])
    work = tmp_path / "work"
    run = reduce(night, work, stages=STAGES, progress=False)
    failed = {(s, l): m for s, l, m in run.failed}
    assert set(failed) == {("dark", "sci-low-joint-dit3"), ("consumer", "sci-low-joint-dit3")}
    assert "dark_3.fits" in failed[("dark", "sci-low-joint-dit3")]
    assert "SCI_PIX has 4 frames, NFRAME says 6" in failed[("dark", "sci-low-joint-dit3")]
    # Dependents fail too, and their message names the root cause's file.
    assert failed[("consumer", "sci-low-joint-dit3")] == (
        "upstream dark/sci-low-joint-dit3 failed (" + failed[("dark", "sci-low-joint-dit3")] + ")")
    assert [Path(p).name for p, _ in run.bad_files] == ["sci1.fits"]
    assert run.exit_code == 1
    assert set(run.computed) == ALL           # the rest of the night finished
    states = _states(work)
    assert states[("dark", "sci-low-joint-dit3")] == "failed"
    assert states[("inventory", "sci1.fits")] == "failed"
    # The broken file's FT table is intact, so the FT dark used it (nothing skipped).
    ft = ProductView(next((work / "dark").glob("ft-period1ms.*.h5")))
    assert json.loads(ft.attrs["skipped_files"]) == []
    text = run.text()
    assert "sci1.fits" in text and "dark_3.fits" in text
    assert "NOT RUN (upstream failed) consumer: sci-low-joint-dit3" in text


def test_config_errors_before_any_work(night, tmp_path):
    work = tmp_path / "work"
    cfg = tmp_path / "bad.toml"
    cfg.write_text("[dark]\nkappa_sigma = 3.0\n")
    with pytest.raises(ConfigError, match="bad.toml.*kappa_sigma"):
        reduce(night, work, config=[cfg], stages=STAGES, progress=False)
    cfg.write_text("[dark]\nframes_per_chunk = 'many'\n")
    with pytest.raises(ConfigError, match=r"bad.toml: \[dark\] frames_per_chunk should be int"):
        reduce(night, work, config=[cfg], stages=STAGES, progress=False)
    cfg.write_text("[dark]\nkappa = -1\n")
    with pytest.raises(ConfigError, match="kappa must be positive"):
        reduce(night, work, config=[cfg], stages=STAGES, progress=False)
    assert not (work / "dark").exists() and not (work / LOCK_FILE).exists()


def test_lock(night, tmp_path):
    work = tmp_path / "work"
    work.mkdir()
    import socket
    (work / LOCK_FILE).write_text(json.dumps({"pid": os.getpid(), "host": socket.gethostname()}))
    with pytest.raises(Locked, match="another reduction"):
        reduce(night, work, stages=STAGES, progress=False)
    # A lock left by a process that no longer exists is taken over.
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    (work / LOCK_FILE).write_text(json.dumps({"pid": dead.pid, "host": socket.gethostname()}))
    assert reduce(night, work, stages=STAGES, progress=False).exit_code == 0
    assert not (work / LOCK_FILE).exists()


KILLED_RUN = """
import sys
sys.path.insert(0, {tests!r})
from fake_stages import CONSUMER, CRASHER, SLOW
from recipes import dark, inventory
from pipeline.engine import reduce
reduce({night!r}, {work!r}, stages=[inventory.STAGE, dark.STAGE, CONSUMER, SLOW],
       progress=False)
"""


def test_killed_run_leaves_nothing_trusted(night, tmp_path):
    work, clean = tmp_path / "work", tmp_path / "clean"
    marker = tmp_path / "marker"
    code = KILLED_RUN.format(tests=str(Path(__file__).parent), night=str(night), work=str(work))
    env = dict(os.environ, TWINFIELD_TEST_MARKER=str(marker))
    proc = subprocess.Popen([sys.executable, "-c", code], env=env, cwd=Path(__file__).parents[1])
    try:
        for _ in range(600):                        # wait for the slow product to be mid-write
            if marker.exists() or proc.poll() is not None:
                break
            time.sleep(0.05)
        assert marker.exists(), "the run did not reach the slow product"
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
    finally:
        if proc.poll() is None:
            proc.kill()
    stages = STAGES + [SLOW]
    assert list(work.glob("slow/.*.tmp"))          # a partial file exists...
    plan = build_plan(night, work, stages=stages)
    assert plan.state(plan.units[("slow", "all")]) == "missing"    # ... and is not trusted
    assert (work / LOCK_FILE).exists()             # left by the killed run
    resumed = reduce(night, work, stages=stages, progress=False)
    assert resumed.exit_code == 0 and ("slow", "all") in resumed.computed
    assert not list(work.glob("*/.*.tmp"))
    reduce(night, clean, stages=stages, progress=False)
    for uid, pu in build_plan(night, clean, stages=stages).units.items():
        mine = plan.units[uid]
        assert mine.key == pu.key and is_complete(mine.path)
        a, b = ProductView(mine.path), ProductView(pu.path)
        for name in b.keys():
            _assert_equal(a[name], b[name])


def _assert_equal(a, b):
    """Datasets equal, NaN included (field by field for tables)."""
    for f in a.dtype.names or [None]:
        np.testing.assert_array_equal(a[f] if f else a, b[f] if f else b)


def test_processes_scheduler_gives_the_same_products(night, tmp_path):
    threads = reduce(night, tmp_path / "t", stages=[inventory.STAGE, dark.STAGE],
                     progress=False)
    procs = reduce(night, tmp_path / "p", stages=[inventory.STAGE, dark.STAGE],
                   scheduler="processes", workers=2, progress=False)
    assert threads.exit_code == procs.exit_code == 0
    for path in (tmp_path / "t" / "dark").glob("*.h5"):
        a, b = ProductView(path), ProductView(tmp_path / "p" / "dark" / path.name)
        _assert_equal(a["master"], b["master"])


def test_apart_stage_runs_in_helper_processes_with_the_same_products(night, tmp_path):
    """Units of a ``Stage.apart`` stage run in helper processes under the threads
    scheduler (the product records the process that ran it), write the products they
    write on a thread, and leave no process behind."""
    import multiprocessing
    stages = [inventory.STAGE, dark.STAGE, WHERE]
    apart = reduce(night, tmp_path / "apart", stages=stages, progress=False)
    inline = reduce(night, tmp_path / "inline", stages=stages, progress=False,
                    helper_processes=False)
    assert apart.exit_code == inline.exit_code == 0
    paths = sorted((tmp_path / "apart" / "where").glob("*.h5"))
    assert len(paths) == 2
    for path in paths:
        a, b = ProductView(path), ProductView(tmp_path / "inline" / "where" / path.name)
        assert a.attrs["pid"] != os.getpid() and b.attrs["pid"] == os.getpid()
        _assert_equal(a["level"], b["level"])
    assert multiprocessing.active_children() == []


UNGUARDED_SCRIPT = """
import os, sys
sys.path.insert(0, {tests!r})
from fake_stages import WHERE
from recipes import dark, inventory
from pipeline.engine import reduce
from pipeline.store import ProductView
from pathlib import Path
run = reduce({night!r}, {work!r}, stages=[inventory.STAGE, dark.STAGE, WHERE], progress=False)
pids = [ProductView(p).attrs["pid"] for p in Path({work!r}, "where").glob("*.h5")]
print(run.exit_code, len(pids), all(p == os.getpid() for p in pids))
"""


def test_unguarded_script_keeps_units_on_threads(night, tmp_path):
    """A script without an ``if __name__ == "__main__":`` guard would be run again by
    each spawned helper (Python's spawn imports the main script): its units run on the
    threads instead, and the reduction succeeds."""
    script = tmp_path / "unguarded.py"
    script.write_text(UNGUARDED_SCRIPT.format(tests=str(Path(__file__).parent),
                                              night=str(night), work=str(tmp_path / "w")))
    out = subprocess.run([sys.executable, str(script)], capture_output=True, text=True,
                         cwd=Path(__file__).parents[1], timeout=300)
    assert out.returncode == 0, out.stderr
    assert out.stdout.split() == ["0", "2", "True"]


def test_a_dying_helper_process_fails_its_unit_only(night, tmp_path):
    """A unit that kills its helper process fails with a record naming the loss; the
    units beside it are run again and succeed, and this process goes on."""
    stages = [inventory.STAGE, dark.STAGE, APART_CRASHER]
    run = reduce(night, tmp_path / "work", stages=stages, progress=False)
    crashed = [f for f in run.failed if f[0] == "apartcrash"]
    assert len(crashed) == 1 and "BrokenProcessPool" in crashed[0][2], run.text()
    others = [uid for uid in run.computed if uid[0] == "apartcrash"]
    assert len(others) == 1 and others[0][1] != crashed[0][1]
    record = [r for r in status(tmp_path / "work", stages=stages)
              if r["stage"] == "apartcrash" and r["name"] == crashed[0][1]]
    assert record and record[0]["state"] == "failed"


def _faults_of_reallocating(n: int = 8, mib: int = 64) -> int:
    """Minor page faults of this process while it allocates, fills and frees an
    array of ``mib`` MiB ``n`` times (after a first time)."""
    import resource
    a = np.ones(mib * 2**17)
    del a
    before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    for _ in range(n):
        a = np.ones(mib * 2**17)
        del a
    return resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="glibc's mallopt(3) only")
def test_helpers_keep_freed_memory_for_the_next_array():
    """A helper process hands a freed large array's memory out again: no page is faulted
    in afresh. A plain spawned process maps every array above glibc's mmap threshold
    (at most 32 MiB, mallopt(3)) afresh and faults in each of its pages, at least one
    fault per 2-MiB huge page."""
    from concurrent.futures import ProcessPoolExecutor
    from pipeline.engine import _helper_pool, _spawn
    with ProcessPoolExecutor(1, mp_context=_spawn()) as plain:
        plain_faults = plain.submit(_faults_of_reallocating).result(timeout=120)
    with _helper_pool(1) as helper:
        helper_faults = helper.submit(_faults_of_reallocating).result(timeout=120)
    assert plain_faults >= 8 * 64 // 2, plain_faults
    assert helper_faults < 0.05 * plain_faults, (helper_faults, plain_faults)


def test_tiny_night_darks_against_truth(tiny_night, tmp_path):
    """The simulated night's detectors (truth.json, written by the simulator's forward
    model) recovered by the dark stage."""
    work = tmp_path / "work"
    run = reduce(tiny_night, work, stages=[inventory.STAGE, dark.STAGE], progress=False)
    assert run.exit_code == 0 and run.failed == []
    truth = json.loads((tiny_night / "truth.json").read_text())["instrument"]["detectors"]
    plan = build_plan(tiny_night, work, stages=[inventory.STAGE, dark.STAGE])
    darks = [pu for (s, _), pu in plan.units.items() if s == "dark"]
    assert {pu.unit.meta["channel"] for pu in darks} == {"sci", "ft"}
    for pu in darks:
        view = ProductView(pu.path)
        det = truth["science" if pu.unit.meta["channel"] == "sci" else "ft"]
        master, noise, valid = view["master"], view["read_noise"], view["valid"]
        assert view.axes("master") == (("y", "x") if pu.unit.meta["channel"] == "sci"
                                       else ("output", "ft_wave"))
        # Level: the bias (mean of the simulated pattern) plus a negligible dark
        # (<= 0.05 e-/s x 0.1 s); 0.3 ADU covers sampling a 3-ADU rms pattern in a window.
        assert abs(master[valid].mean() - det["bias_mean_adu"]) < 0.3
        # Temporal noise: read noise / gain, plus integer rounding (variance 1/12 ADU^2).
        # Few pairs per pixel but thousands of pixels: rms within 4 % (~5 sigma).
        expected = np.hypot(det["read_noise_e"] / det["gain_e_per_adu"], np.sqrt(1 / 12))
        assert abs(np.sqrt(np.mean(noise[valid] ** 2)) / expected - 1) < 0.04
        # Hot pixels found are true hot pixels (no false alarms).
        hot = {tuple(p) for p in np.argwhere(view["hot"])}
        assert hot <= {tuple(p) for p in det["hot_pixels"]}


def test_missing_upstream_names_the_missing_calibration(night, tmp_path, rng):
    """A consumer of a dark that does not exist fails with the inventory's reason."""
    from dataclasses import replace as dc_replace

    from pipeline.inventory import dark_label
    from pipeline.stage import Unit

    def plan(inv, params, upstream):
        return [Unit(label=r.name, raw=(r.path,),
                     needs={"dark": ("dark", dark_label(r.setup, r.polmode, r.dit))})
                for r in inv.select("science")]
    wants = dc_replace(CONSUMER, name="wants", plan=plan)
    write_raw(night / "long.fits", "science", rng=rng, dit=7.0, mjd=61000.3, expno=77)
    run = reduce(night, tmp_path / "work", stages=[inventory.STAGE, dark.STAGE, wants],
                 progress=False)
    failed = {(s, l): m for s, l, m in run.failed}
    assert list(failed) == [("wants", "long")]
    assert failed[("wants", "long")] == ("needs dark/sci-low-joint-dit7, which is not planned "
                                         "(long.fits: no dark of DIT 7 s in set-up 'low')")


def test_distributed_scheduler_by_address(night, tmp_path):
    """An existing dask.distributed cluster, reached by its tcp:// address. Its workers
    started with dask's default MALLOC_TRIM_THRESHOLD_ make the log say so (it doubles
    the CPU time); with the variable unset in the dask configuration, it says nothing."""
    import dask
    from distributed import LocalCluster
    with LocalCluster(n_workers=1, threads_per_worker=2, processes=True,
                      dashboard_address=None) as cluster:
        assert cluster.scheduler_address.startswith("tcp://")
        run = reduce(night, tmp_path / "work", stages=[inventory.STAGE, dark.STAGE],
                     scheduler=cluster.scheduler_address, progress=False)
    assert run.exit_code == 0 and len(run.computed) == 4
    assert "1 of 1 workers run with MALLOC_TRIM_THRESHOLD_=" in \
        (tmp_path / "work" / LOG_FILE).read_text()
    os.environ.pop("MALLOC_TRIM_THRESHOLD_", None)      # the first nanny set it here too
    unset = {"distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None}
    with dask.config.set(unset), LocalCluster(n_workers=1, threads_per_worker=1,
                                              processes=True, dashboard_address=None) as cluster:
        run = reduce(night, tmp_path / "work2", stages=[inventory.STAGE, dark.STAGE],
                     scheduler=cluster.scheduler_address, progress=False)
    assert run.exit_code == 0
    assert "MALLOC_TRIM_THRESHOLD_" not in (tmp_path / "work2" / LOG_FILE).read_text()


def test_distributed_lost_worker_fails_its_unit_only(night, tmp_path):
    """A unit whose worker process dies fails with a failure record naming the loss; the
    other units of the night still run (the scheduler is told not to retry it)."""
    import dask
    from distributed import LocalCluster
    tests_dir = str(Path(__file__).parent)            # fake_stages, for the workers
    with dask.config.set({"distributed.scheduler.allowed-failures": 0}), \
            LocalCluster(n_workers=1, threads_per_worker=1, processes=True,
                         dashboard_address=None, env={"PYTHONPATH": tests_dir}) as cluster:
        run = reduce(night, tmp_path / "work", stages=[inventory.STAGE, dark.STAGE, CRASHER],
                     scheduler=cluster.scheduler_address, progress=False)
    crashed = [(s, l, m) for s, l, m in run.failed]
    assert len(crashed) == 1 and crashed[0][0] == "crasher", run.text()
    assert "KilledWorker" in crashed[0][2]
    others = [uid for uid in run.computed if uid[0] == "crasher"]
    assert len(others) >= 1 and all(uid[1] != crashed[0][1] for uid in others)
    stages = [inventory.STAGE, dark.STAGE, CRASHER]
    record = [r for r in status(tmp_path / "work", stages=stages) if r["stage"] == "crasher"
              and r["name"] == crashed[0][1]]
    assert record and record[0]["state"] == "failed"


@pytest.mark.slow
def test_tiny_night_whole_graph(tiny_night, tmp_path):
    """Every registered stage on the tiny simulated night: the night reduces without a
    failure, and a second reduce recomputes nothing."""
    import recipes
    work = tmp_path / "work"
    first = reduce(tiny_night, work, progress=False)
    assert first.exit_code == 0, first.text()
    assert len(first.computed) >= len(recipes.STAGES)
    second = reduce(tiny_night, work, progress=False)
    assert second.computed == [] and len(second.reused) == len(first.computed)


def test_nothing_to_do_is_a_recorded_skip(night, tmp_path):
    from dataclasses import replace as dc_replace

    from pipeline.errors import NothingToDo

    def run(inputs, params):
        raise NothingToDo("no split-polarisation frames tonight")
    skipper = dc_replace(CONSUMER, name="skipper", run=run)
    summary = reduce(night, tmp_path / "w", stages=[inventory.STAGE, dark.STAGE, skipper],
                     progress=False)
    assert summary.exit_code == 0
    path = next((tmp_path / "w" / "skipper").glob("*.h5"))
    assert ProductView(path).attrs["skipped"] == "no split-polarisation frames tonight"


def test_inventory_product_and_provenance(night, tmp_path):
    work = tmp_path / "w"
    reduce(night, work, stages=[inventory.STAGE, dark.STAGE], progress=False)
    plan = build_plan(night, work, stages=[inventory.STAGE, dark.STAGE])
    files = ProductView(plan.units[("inventory", "night")].path)["files"]
    assert sorted(files["path"]) == sorted(r.path for r in plan.inventory.records)
    pu = plan.units[("dark", "sci-low-joint-dit1")]
    attrs = ProductView(pu.path).attrs
    import pipeline
    assert attrs["stage"] == "dark" and attrs["key"] == pu.key and attrs["version"] == "1"
    assert attrs["code_version"] == pipeline.__version__ and attrs["created"].endswith("Z")
    assert json.loads(attrs["raw_files"]) == [str(night / "dark_1.fits")]
    assert json.loads(attrs["params"]) == dataclasses.asdict(dark.DarkParams())


def test_a_failing_plan_fails_its_stage_only(night, tmp_path):
    from dataclasses import replace as dc_replace

    def plan(inv, params, upstream):
        raise KeyError("no such set-up")
    broken = dc_replace(CONSUMER, name="broken", plan=plan)
    summary = reduce(night, tmp_path / "w", stages=[inventory.STAGE, dark.STAGE, broken],
                     progress=False)
    assert summary.failed == [("broken", "(plan)", "KeyError: 'no such set-up'")]
    assert set(summary.computed) == {("inventory", "night")} | DARKS and summary.exit_code == 1


def test_instrument_model_change_makes_everything_stale(night, tmp_path, monkeypatch):
    import pipeline.engine as engine
    work = tmp_path / "w"
    reduce(night, work, stages=STAGES, progress=False)
    monkeypatch.setattr(engine, "_instrument_hash", lambda: "edited calib/instrument.toml")
    assert set(_states(work).values()) == {"stale"}


def test_work_directory_inside_the_night(night, rng):
    """Products written under the night (e.g. OIFITS files) are not mistaken for raw files."""
    work = night / "work"
    (work / "oifits").mkdir(parents=True)
    (work / "oifits" / "x.fits").write_bytes(b"not raw")
    assert reduce(night, work, stages=STAGES, progress=False).exit_code == 0
