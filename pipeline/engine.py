# SPDX-License-Identifier: BSD-3-Clause
"""The reduction engine: plan every stage, key every product, run what is not current.

1. Parameters are loaded and checked (``pipeline.config``) and the night's
   headers read (``pipeline.inventory``) before any pixel is touched.
2. Each stage of ``recipes.STAGES`` plans its units from the inventory and the
   upstream units; each unit gets a content key (``pipeline.keys``).
3. A Dask graph holds one task per unit that is not current; current products
   are reused. Tasks never raise: a failing unit writes a failure record and
   returns it, and every dependent unit fails with "upstream ... failed", so one
   bad file fails its own branch while the rest of the night finishes.
4. Scheduler: ``threads`` (default), ``processes`` or a dask.distributed address.

The engine knows nothing of physics.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import re
import socket
import sys
import time
import traceback
import uuid
from dataclasses import dataclass, field
from pathlib import Path

from . import __version__
from .config import DEFAULT_CONFIG, load_params
from .errors import BadInput, ConfigError, NothingToDo, TwinfieldError
from .inventory import Inventory
from .keys import params_json, unit_key
from .stage import Inputs, Unit
from .store import (ProductView, failure_path, is_complete, product_path, products_of,
                    read_failure, write_failure, write_product)

__all__ = ["Plan", "PlannedUnit", "RunSummary", "Locked", "MissingCalibrations",
           "build_plan", "reduce", "rerun", "status", "STATE_FILE", "LOG_FILE", "LOCK_FILE"]

STATE_FILE, LOG_FILE, LOCK_FILE = "twinfield.json", "twinfield.log", "twinfield.lock"
log = logging.getLogger("twinfield")


class Locked(TwinfieldError):
    """Another reduction holds the work directory."""


class MissingCalibrations(TwinfieldError):
    """Strict mode: calibrations are missing at plan time."""


@dataclass
class PlannedUnit:
    stage: str
    unit: Unit
    key: str
    path: Path
    raw_ids: list
    upstream: dict                  # role -> (stage, label)
    error: str | None = None        # planning problem (fails the unit without running)

    @property
    def id(self) -> tuple[str, str]:
        return (self.stage, self.unit.label)


@dataclass
class Plan:
    night_dir: str
    workdir: Path
    inventory: Inventory
    params: dict
    stages: list
    units: dict = field(default_factory=dict)     # (stage, label) -> PlannedUnit, graph order
    stage_errors: dict = field(default_factory=dict)  # stage -> why its plan() failed

    def is_current(self, pu: PlannedUnit) -> bool:
        """Complete, and (for a ``partial`` stage) made with every input that now exists."""
        if not is_complete(pu.path):
            return False
        if not _stage_of(self, pu.stage).partial:
            return True
        with ProductView(pu.path) as view:
            missing = json.loads(view.attrs.get("missing_inputs", "{}") or "{}")
        return not any(is_complete(self.units[tuple(ref)].path) for ref in missing.values()
                       if tuple(ref) in self.units)

    def state(self, pu: PlannedUnit) -> str:
        """current | failed | stale | missing."""
        if self.is_current(pu):
            return "current"
        if failure_path(self.workdir, pu.stage, pu.unit.label, pu.key).is_file():
            return "failed"
        if products_of(self.workdir, pu.stage, pu.unit.label):
            return "stale"
        return "missing"

    def dependents(self, ids) -> set:
        """``ids`` and every unit downstream of them."""
        out = set(ids)
        for uid, pu in self.units.items():          # graph order: one pass suffices
            if any(up in out for up in pu.upstream.values()):
                out.add(uid)
        return out


@dataclass
class RunSummary:
    computed: list = field(default_factory=list)   # (stage, label)
    reused: list = field(default_factory=list)
    failed: list = field(default_factory=list)     # (stage, label, message)
    bad_files: list = field(default_factory=list)  # (path, problem)
    seconds: float = 0.0

    @property
    def exit_code(self) -> int:
        return 1 if self.failed or self.bad_files else 0

    def text(self) -> str:
        """Counts, then each root failure with its message, then the units that did not
        run because an upstream product failed (grouped by stage)."""
        lines = [f"{len(self.computed)} product(s) computed, {len(self.reused)} reused, "
                 f"{len(self.failed)} failed, {len(self.bad_files)} unreadable file(s) "
                 f"in {self.seconds:.1f} s"]
        lines += [f"  UNREADABLE {p}: {m}" for p, m in self.bad_files]
        downstream = {}
        for s, l, m in self.failed:
            if m.startswith("upstream "):
                downstream.setdefault(s, []).append(l)
            else:
                lines.append(f"  FAILED {s}/{l}: {m}")
        lines += [f"  NOT RUN (upstream failed) {s}: {', '.join(ls)}"
                  for s, ls in downstream.items()]
        return "\n".join(lines)


def _stages():
    import recipes
    return list(recipes.STAGES)


def _instrument_hash() -> str:
    from .instrument import DEFAULT_INSTRUMENT
    return hashlib.sha256(Path(DEFAULT_INSTRUMENT).read_bytes()).hexdigest()


def config_files(extra=None) -> list[Path]:
    files = [DEFAULT_CONFIG] if DEFAULT_CONFIG.is_file() else []
    return files + [Path(p).resolve() for p in (extra or [])]


def build_plan(night_dir, workdir, *, config=None, stages=None) -> Plan:
    """Check parameters, read the headers, plan and key every unit of every stage.

    Raises ConfigError (bad parameters) and BadInput (no night directory)."""
    stages = _stages() if stages is None else list(stages)
    import recipes
    params = load_params(stages, config_files(config),
                         also_known=[s.name for s in recipes.STAGES])
    inventory = Inventory.scan(night_dir)
    plan = Plan(inventory.night_dir, Path(workdir).resolve(), inventory, params, stages)
    ids = {r.path: r.identity for r in inventory.records}
    bad = dict(inventory.bad)
    problems = inventory.problems()
    salt = {"@instrument": _instrument_hash()}
    for stage in stages:
        upstream = {}
        for (sname, _), pu in plan.units.items():
            upstream.setdefault(sname, []).append(pu.unit)
        try:
            units = list(stage.plan(inventory, params[stage.name], upstream) or [])
        except ConfigError:
            raise
        except Exception as exc:      # the stage fails; its dependents fail with it
            plan.stage_errors[stage.name] = (str(exc) if isinstance(exc, TwinfieldError)
                                             else f"{type(exc).__name__}: {exc}")
            log.error("plan of stage %s failed: %s", stage.name, plan.stage_errors[stage.name])
            units = []
        for unit in units:
            error, raw_ids = None, []
            for p in unit.raw:
                p = str(Path(p).resolve())
                if p in ids:
                    raw_ids.append(ids[p])
                else:
                    raw_ids.append((p, "unreadable"))
                    error = error or f"{p}: {bad.get(p, 'not a readable raw file of this night')}"
            up_keys = dict(salt)
            upstream_ids = {}
            for role, (sname, label) in dict(unit.needs).items():
                up = plan.units.get((sname, label))
                upstream_ids[role] = (sname, label)
                if up is None:
                    why = "; ".join(f"{Path(p).name}: {m}" for p, m in problems
                                    if p in unit.raw)
                    error = error or (f"needs {sname}/{label}, which is not planned"
                                      + (f" ({why})" if why else ""))
                    up_keys[role] = "absent"
                else:
                    up_keys[role] = up.key
            key = unit_key(stage.name, stage.version, params[stage.name], unit.label,
                           unit.meta, raw_ids, up_keys)
            uid = (stage.name, unit.label)
            if uid in plan.units:
                raise ConfigError(f"recipes/{stage.name}.py",
                                  f"plan() returned label {unit.label!r} twice")
            plan.units[uid] = PlannedUnit(stage.name, unit, key,
                                          product_path(plan.workdir, stage.name, unit.label, key),
                                          raw_ids, upstream_ids, error)
    return plan


# -- execution of one unit (runs in a worker: threads, processes or distributed) -------------

def _execute(spec: dict, upstream: dict) -> dict:
    stage_name, unit, key = spec["stage"], spec["unit"], spec["key"]
    workdir = Path(spec["workdir"])
    t0, cpu0 = time.perf_counter(), time.thread_time()
    prov = {"stage": stage_name, "label": unit.label, "key": key}
    stage = spec["stage_obj"]
    failed_roles = {role: r for role, r in upstream.items() if r["state"] == "failed"}
    failed_up = [] if stage.partial else list(failed_roles.values())
    try:
        if spec["error"]:
            raise _UnitError(spec["error"])
        if failed_up:
            names = ", ".join(dict.fromkeys(f"{r['stage']}/{r['label']}" for r in failed_up))
            raise _UnitError(f"upstream {names} failed ({failed_up[0]['root']})")
        from .instrument import load_instrument
        from .rawio import RawExposure
        inputs = Inputs(unit=unit, raw=[RawExposure(p) for p in unit.raw],
                        products={role: ProductView(r["path"]) for role, r in upstream.items()
                                  if role not in failed_roles},
                        instrument=load_instrument(), workdir=workdir,
                        failed={role: f"{r['stage']}/{r['label']}: {r['message']}"
                                for role, r in failed_roles.items()})
        skipped = ""
        try:
            outputs = stage.run(inputs, spec["params"]) or {}
        except NothingToDo as exc:
            outputs, skipped = {}, str(exc) or "nothing to do"
        finally:
            for view in inputs.products.values():
                view.close()
        prov.update({
            "version": spec["version"], "params": params_json(spec["params"]),
            "unit_meta": json.dumps(dict(unit.meta), default=repr),
            "raw_files": json.dumps(list(unit.raw)),
            "raw_identities": json.dumps(spec["raw_ids"]),
            "input_keys": json.dumps({r: u["key"] for r, u in upstream.items()}),
            "missing_inputs": json.dumps({r: [u["stage"], u["label"]]
                                          for r, u in failed_roles.items()}),
            "input_paths": json.dumps({r: u["path"] for r, u in upstream.items()}),
            "code_version": __version__,
            "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "skipped": skipped})
        path = write_product(spec["path"], outputs, prov)
        failure_path(workdir, stage_name, unit.label, key).unlink(missing_ok=True)
        return {**prov, "state": "computed", "path": str(path), "message": skipped,
                "seconds": time.perf_counter() - t0, "cpu_seconds": time.thread_time() - cpu0}
    except Exception as exc:
        if isinstance(exc, _UnitError):
            message, tb = str(exc), ""
        elif isinstance(exc, BadInput):
            message, tb = str(exc), traceback.format_exc()
        else:
            message = f"{type(exc).__name__}: {exc}"
            tb = traceback.format_exc()
        try:
            write_failure(workdir, stage_name, unit.label, key, message,
                          {**prov, "traceback": tb})
        except OSError:
            pass
        root = failed_up[0]["root"] if failed_up and not spec["error"] else message
        return {**prov, "state": "failed", "path": "", "message": message, "traceback": tb,
                "root": root, "seconds": time.perf_counter() - t0,
                "cpu_seconds": time.thread_time() - cpu0}


class _Helpers:
    """Helper processes for the units of ``Stage.apart`` stages under the threads
    scheduler.

    A pure-Python loop (an lmfit refinement) or a matplotlib drawing holds the GIL for
    most of its time, and a numpy-heavy unit between its numpy calls; on a thread each
    stalls the others. Such a unit is sent whole (:func:`_execute`: read inputs, run,
    write the product) to one of ``n`` spawned processes, made on first use; its thread
    waits without holding the GIL. The processes end with this one (even killed). Where
    no process can be made (in a daemonic process, a dask worker's) units run on their
    thread.

    A helper that dies (killed, or a crash in C) takes down the units it was running
    and the pool; each of them is run once more alone in a fresh process, so only the
    unit that kills its process again fails (recorded like a lost dask worker)."""

    def __init__(self, n: int):
        import threading
        self.n, self.pool, self.unavailable = n, None, False
        self.lock = threading.Lock()

    def execute(self, spec: dict, upstream: dict) -> dict:
        from concurrent.futures.process import BrokenProcessPool
        pool = self._pool()
        if pool is None:
            return _execute(spec, upstream)
        try:
            return pool.submit(_execute, spec, upstream).result()
        except BrokenProcessPool:
            with self.lock:
                if self.pool is pool:
                    self.pool = None                # the next units get a new pool
        log.warning("a helper process died running %s/%s or a unit beside it; running it "
                    "again alone", spec["stage"], spec["unit"].label)
        with _helper_pool(1) as alone:
            try:
                return alone.submit(_execute, spec, upstream).result()
            except BrokenProcessPool as exc:
                return _failed_result(spec, exc)

    def _pool(self):
        import multiprocessing
        with self.lock:
            if self.pool is None and not self.unavailable:
                if multiprocessing.current_process().daemon:
                    self.unavailable = True                # no children in a daemonic process
                elif not _main_is_importable():
                    self.unavailable = True
                    log.info("helper processes not used: the main script has no "
                             "'if __name__ == \"__main__\":' guard")
                else:
                    self.pool = _helper_pool(self.n)
            return self.pool

    def close(self) -> None:
        """Stop the processes and wait for them (their CPU time is then counted among
        this process's children's)."""
        with self.lock:
            pool, self.pool = self.pool, None
        if pool is not None:
            pool.shutdown(wait=True)


def _main_is_importable() -> bool:
    """Whether a spawned process can import ``__main__`` (as Python's spawn does)
    without starting a reduction itself: run as a module (``-m``, a console script's
    guarded file), interactive (no file), or a script with a ``__main__`` guard."""
    main = sys.modules.get("__main__")
    if getattr(getattr(main, "__spec__", None), "name", None):
        return True
    path = getattr(main, "__file__", None)
    if not path:
        return True
    try:
        return "__main__" in Path(path).read_text(errors="ignore")
    except OSError:
        return False


def _helper_pool(n: int):
    """``n`` spawned helper processes that end with this one."""
    from concurrent.futures import ProcessPoolExecutor
    return ProcessPoolExecutor(n, mp_context=_spawn(), initializer=_start_helper,
                               initargs=(os.getpid(),))


def _start_helper(parent_pid: int) -> None:
    """Initializer of every helper process."""
    _die_with_parent(parent_pid)
    _keep_freed_memory()


# glibc mallopt(3) parameters; the heap is trimmed above this much free at its top
_M_TRIM_THRESHOLD, _M_MMAP_MAX = -1, -4
_HELPER_TRIM_BYTES = 2**30


def _keep_freed_memory() -> bool:
    """In a helper process: let glibc's malloc keep the memory numpy frees and hand it out
    again, instead of mapping every large array afresh and unmapping it on free. Each
    fresh page costs the kernel a fault and a zeroing, dearly on a virtual machine: on
    the bench night this took a third to a half of the reduction's system time
    (docs/benchmarks.md). No array is mapped on its own (``M_MMAP_MAX`` 0) and the heap is
    given back to the system only when more than 1 GiB is free at its top, so a helper
    holds about its largest unit's peak. Returns False where the C library has no
    ``mallopt`` or refuses it (nothing done)."""
    import ctypes
    try:
        mallopt = ctypes.CDLL(None).mallopt        # the C library the process runs on
    except (OSError, AttributeError):
        return False
    mallopt.argtypes, mallopt.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
    return bool(mallopt(_M_MMAP_MAX, 0)) and bool(mallopt(_M_TRIM_THRESHOLD,
                                                          _HELPER_TRIM_BYTES))


def _die_with_parent(parent_pid: int) -> None:
    """In a helper process: end it once the reducing process ``parent_pid`` is gone
    (killed, say), so that no orphaned helper goes on computing and writing into the work
    directory beside the run that takes it over. A thread looks every 0.2 s. (Linux's
    parent-death signal would follow the thread that spawned the helper, not the
    process.)"""
    import threading

    def watch():
        while os.getppid() == parent_pid:
            time.sleep(0.2)
        os._exit(1)
    threading.Thread(target=watch, name="twinfield-parent-watch", daemon=True).start()


def _spawn():
    """Fresh interpreters (not forks of a process that runs threads)."""
    import multiprocessing
    return multiprocessing.get_context("spawn")


class _UnitError(Exception):
    """A unit that cannot run (planning problem, failed upstream)."""


# -- the work directory: state file, lock, log --------------------------------------------

def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class _WorkLock:
    def __init__(self, workdir: Path):
        self.path = workdir / LOCK_FILE
        self.owned = False

    def __enter__(self):
        me = {"pid": os.getpid(), "host": socket.gethostname(), "since": time.time()}
        for _ in range(2):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                try:
                    other = json.loads(self.path.read_text())
                except (OSError, ValueError):
                    other = {}
                if other.get("host") == me["host"] and not _pid_alive(int(other.get("pid", 0))):
                    self.path.unlink(missing_ok=True)        # left by a killed run
                    continue
                raise Locked(f"{self.path.parent}: another reduction (pid {other.get('pid')} on "
                             f"{other.get('host')}) is using this work directory; wait for it or "
                             f"remove {self.path} if it is gone") from None
            with os.fdopen(fd, "w") as fh:
                json.dump(me, fh)
            self.owned = True
            return self
        raise Locked(f"{self.path}: could not take the lock")

    def __exit__(self, *exc):
        if self.owned:
            self.path.unlink(missing_ok=True)


def _start_log(workdir: Path, debug: bool):
    handler = logging.FileHandler(workdir / LOG_FILE)
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s",
                                           "%Y-%m-%dT%H:%M:%S"))
    log.addHandler(handler)
    log.setLevel(logging.DEBUG if debug else logging.INFO)
    return handler


def _save_state(workdir: Path, night_dir: str, config) -> None:
    state = {"night_dir": night_dir, "config": [str(Path(c).resolve()) for c in config or []],
             "code_version": __version__}
    tmp = workdir / (STATE_FILE + ".tmp")
    tmp.write_text(json.dumps(state, indent=1))
    os.replace(tmp, workdir / STATE_FILE)


def load_state(workdir) -> dict:
    path = Path(workdir) / STATE_FILE
    try:
        return json.loads(path.read_text())
    except FileNotFoundError:
        raise ConfigError(path, "not a twinfield work directory (no state file); run "
                                "`twinfield reduce NIGHT -o WORK` first") from None
    except ValueError as exc:
        raise ConfigError(path, f"unreadable state file: {exc}") from None


# -- running the graph ---------------------------------------------------------------------

def _log_result(res: dict, debug: bool) -> None:
    """One log line per finished unit, as it finishes."""
    if res["state"] == "failed":
        log.error("FAILED %s/%s %s: %s", res["stage"], res["label"], res["key"], res["message"],
                  extra={"file_only": True})          # the summary repeats it
        if res.get("traceback") and debug:
            log.debug(res["traceback"])
    else:
        # CPU: the unit's own thread (or helper process); numpy's BLAS runs on it
        log.info("computed %s/%s %s in %.2f s (%.2f CPU s)%s", res["stage"], res["label"],
                 res["key"], res["seconds"], res.get("cpu_seconds", float("nan")),
                 f" (skipped: {res['message']})" if res["message"] else "")


_UNIT_LINE = re.compile(r"computed (?P<stage>[^/\s]+)/\S+ \S+ in (?P<wall>[\d.]+) s "
                        r"\((?P<cpu>[\d.na]+) CPU s\)")


def unit_seconds(log_text: str) -> dict:
    """Per stage, the units computed and their summed wall and CPU seconds, from the unit
    lines of a log (:func:`_log_result`): {stage: {"units", "wall_s", "cpu_s"}}."""
    out: dict = {}
    for m in _UNIT_LINE.finditer(log_text):
        row = out.setdefault(m["stage"], {"units": 0, "wall_s": 0.0, "cpu_s": 0.0})
        row["units"] += 1
        row["wall_s"] += float(m["wall"])
        row["cpu_s"] += float(m["cpu"])
    return out


def _is_result(x) -> bool:
    return isinstance(x, dict) and "state" in x and "stage" in x and "label" in x


def _compute(tasks: list, scheduler: str, workers: int | None, progress: bool,
             debug: bool = False) -> list:
    """Results of the local dask graph ``tasks`` (threads, processes or synchronous)."""
    import dask
    from dask.callbacks import Callback
    if scheduler not in ("threads", "processes", "synchronous"):
        raise ConfigError("--scheduler", f"expected threads, processes or tcp://HOST:PORT, "
                                         f"found {scheduler!r}")
    from dask.base import named_schedulers
    # the function, not its name: a name makes dask import distributed to look for a client
    kw = {"scheduler": named_schedulers[scheduler]}
    if workers:
        kw["num_workers"] = workers

    def posttask(key, result, dsk, state, worker_id):    # runs in this process
        if _is_result(result):
            _log_result(result, debug)
    with Callback(posttask=posttask):
        if progress:
            from dask.diagnostics import ProgressBar
            with ProgressBar():
                return list(dask.compute(*tasks, **kw))
        return list(dask.compute(*tasks, **kw))


def _failed_result(spec: dict, exc: BaseException) -> dict:
    """The result of a unit whose task itself failed (a worker lost, say): recorded like
    any failure, so the rest of the night goes on."""
    unit = spec["unit"]
    message = f"{type(exc).__name__}: {exc}"
    prov = {"stage": spec["stage"], "label": unit.label, "key": spec["key"]}
    try:
        write_failure(Path(spec["workdir"]), spec["stage"], unit.label, spec["key"], message,
                      dict(prov))
    except OSError:
        pass
    return {**prov, "state": "failed", "path": "", "message": message, "traceback": "",
            "root": message, "seconds": 0.0}


def _compute_distributed(jobs: list, done: dict, address: str, progress: bool,
                         debug: bool = False) -> dict:
    """Run ``jobs`` [(uid, spec, {role: upstream uid})] on the dask.distributed scheduler
    at ``address``; ``done`` holds the results of the units reused. Returns uid -> result.

    Units pass each other only small result dicts (their products are files), so data
    locality means nothing here, while a unit placed beside its inputs behind a long unit,
    another worker idling, costs the night its length. So this process keeps the queue: a
    unit becomes ready when its upstream units have finished, and is submitted (their
    results as plain arguments, no dask dependency) when a worker thread is free, the
    ready unit with the most units downstream of it first.
    """
    import heapq
    from distributed import Client, wait
    done = dict(done)
    specs = {uid: (spec, refs) for uid, spec, refs in jobs}
    waiting = {uid: {r for r in refs.values() if r in specs} for uid, _, refs in jobs}
    dependents: dict = {uid: [] for uid in specs}
    for uid, ups in waiting.items():
        for up in ups:
            dependents[up].append(uid)
    downstream: dict = {}
    order = {uid: n for n, (uid, _, _) in enumerate(jobs)}
    for uid, _, _ in reversed(jobs):                  # graph order reversed: children first
        downstream[uid] = set(dependents[uid]).union(*(downstream[d] for d in dependents[uid]))
    ready = [(-len(downstream[uid]), order[uid], uid) for uid in specs if not waiting[uid]]
    heapq.heapify(ready)
    results, running, run = {}, {}, uuid.uuid4().hex     # keys unique to this run
    with Client(address) as client:
        _warn_malloc_trim(client)
        while ready or running:
            slots = max(1, sum(client.nthreads().values()))
            while ready and len(running) < slots:
                uid = heapq.heappop(ready)[2]
                spec, refs = specs[uid]
                up = {role: done[ref] for role, ref in refs.items() if ref in done}
                future = client.submit(_execute, spec, up, pure=False,
                                       key=f"twinfield_unit-{run}-{order[uid]}")
                running[future] = uid
            finished, _ = wait(list(running), return_when="FIRST_COMPLETED")
            for future in finished:
                uid = running.pop(future)
                try:
                    res = future.result()
                except Exception as exc:              # the task itself failed (worker lost)
                    res = _failed_result(specs[uid][0], exc)
                future.release()
                done[uid] = results[uid] = res
                _log_result(res, debug)
                for child in dependents[uid]:
                    waiting[child].discard(uid)
                    if not waiting[child]:
                        heapq.heappush(ready, (-len(downstream[child]), order[child], child))
            if progress:
                print(f"\r[{len(results)}/{len(specs)}] units", end="", file=sys.stderr,
                      flush=True)
    if progress:
        print(file=sys.stderr)
    return results


def _malloc_trim_threshold():
    return os.environ.get("MALLOC_TRIM_THRESHOLD_")


def _warn_malloc_trim(client) -> None:
    """Warn when the workers run with ``MALLOC_TRIM_THRESHOLD_`` set, as dask's nanny sets
    it by default (``distributed.nanny.pre-spawn-environ``). Any explicit value turns off
    glibc's adaptive mmap threshold: every array above 128 kB is then mapped afresh and
    its pages faulted in again, which about doubles this reduction's CPU time (measured
    in docs/benchmarks.md)."""
    try:
        values = client.run(_malloc_trim_threshold)
    except Exception:                   # an old or unusual cluster: nothing to say
        return
    set_on = sorted(w for w, v in values.items() if v is not None)
    if set_on:
        log.warning("%d of %d workers run with MALLOC_TRIM_THRESHOLD_=%s (dask's default), "
                    "which about doubles the reduction's CPU time; start them with it unset "
                    "(dask configuration distributed.nanny.pre-spawn-environ."
                    "MALLOC_TRIM_THRESHOLD_: null, see docs/cli.md)",
                    len(set_on), len(values), values[set_on[0]])


def reduce(night_dir, workdir, *, config=None, scheduler="threads", workers=None,
           force=(), debug=False, progress=None, stages=None,
           helper_processes=True) -> RunSummary:
    """Reduce a night into ``workdir``; returns the summary (never raises for a unit).
    ``helper_processes``: under the threads scheduler, run the units of ``Stage.apart``
    stages in helper processes (:class:`_Helpers`); False: on the threads.

    Raises
    ------
    ConfigError, BadInput (no night), Locked, MissingCalibrations (strict inventory)
    """
    import dask
    t0 = time.perf_counter()
    workdir = Path(workdir).resolve()
    workdir.mkdir(parents=True, exist_ok=True)
    progress = sys.stderr.isatty() if progress is None else progress
    with _WorkLock(workdir):
        handler = _start_log(workdir, debug)
        try:
            plan = build_plan(night_dir, workdir, config=config, stages=stages)
            stage_names = [s.name for s in plan.stages]
            for name in force:
                if name not in stage_names:
                    raise ConfigError("--force", f"no stage {name!r}; stages are {stage_names}")
            _save_state(workdir, plan.night_dir, config)
            for pattern in ("*/.*.tmp", "*/*/.*.tmp"):   # products, stages' caches
                for tmp in workdir.glob(pattern):        # left by a killed run: never trusted
                    tmp.unlink(missing_ok=True)
            log.info("reduce %s -> %s (twinfield %s, scheduler %s)", plan.night_dir, workdir,
                     __version__, scheduler)
            problems = plan.inventory.problems()
            for path, msg in plan.inventory.bad:
                log.error("unreadable raw file %s: %s", path, msg)
            for path, msg in problems:
                log.warning("missing calibration for %s: %s", path, msg)
            inv_params = plan.params.get("inventory")
            if problems and getattr(inv_params, "strict", False):
                raise MissingCalibrations(f"{len(problems)} missing calibration(s) and strict "
                                          f"inventory: {problems[0][0]}: {problems[0][1]}")
            forced = plan.dependents({uid for uid in plan.units if uid[0] in force})
            summary = RunSummary(bad_files=list(plan.inventory.bad))
            summary.failed += [(name, "(plan)", msg) for name, msg in plan.stage_errors.items()]
            values, tasks, jobs = {}, [], []
            distributed = scheduler.startswith(("tcp://", "tls://"))
            helpers = (_Helpers(workers or os.cpu_count() or 1)
                       if scheduler == "threads" and helper_processes else None)
            for uid, pu in plan.units.items():
                if uid not in forced and pu.error is None and plan.is_current(pu):
                    values[uid] = {"stage": pu.stage, "label": pu.unit.label, "key": pu.key,
                                   "state": "reused", "path": str(pu.path)}
                    summary.reused.append(uid)
                    log.info("reuse %s/%s %s", pu.stage, pu.unit.label, pu.key)
                    continue
                stage = _stage_of(plan, pu.stage)
                spec = {"stage": pu.stage, "stage_obj": stage, "unit": pu.unit, "key": pu.key,
                        "path": str(pu.path), "params": plan.params[pu.stage],
                        "version": stage.version, "raw_ids": pu.raw_ids, "workdir": str(workdir),
                        "error": pu.error}
                if distributed:
                    jobs.append((uid, spec, dict(pu.upstream)))
                    continue
                up = {role: values[ref] for role, ref in pu.upstream.items() if ref in values}
                run = helpers.execute if stage.apart and helpers is not None else _execute
                task = dask.delayed(run, pure=False)(
                    spec, up, dask_key_name=f"{pu.stage}:{pu.unit.label}:{pu.key[:8]}")
                values[uid] = task
                tasks.append((uid, task))
            if distributed:
                by_uid = (_compute_distributed(jobs, values, scheduler, progress, debug)
                          if jobs else {})
                finished = [(uid, by_uid[uid]) for uid, _, _ in jobs]
            else:
                try:
                    results = (_compute([t for _, t in tasks], scheduler, workers, progress,
                                        debug) if tasks else [])
                finally:
                    if helpers is not None:
                        helpers.close()
                finished = [(uid, res) for (uid, _), res in zip(tasks, results)]
            for uid, res in finished:
                if res["state"] == "failed":
                    summary.failed.append((uid[0], uid[1], res["message"]))
                else:
                    summary.computed.append(uid)
            summary.seconds = time.perf_counter() - t0
            log.info("summary: %s", summary.text().replace("\n", " |"))
            return summary
        finally:
            log.removeHandler(handler)
            handler.close()


def _stage_of(plan: Plan, stage_name: str):
    return next(s for s in plan.stages if s.name == stage_name)


def rerun(workdir, stage: str, **kw) -> RunSummary:
    """Recompute ``stage`` and everything downstream of it; reuse the rest."""
    state = load_state(workdir)
    return reduce(state["night_dir"], workdir, config=state["config"] or None, force=(stage,),
                  **kw)


def status(workdir, *, stages=None) -> list[dict]:
    """Every planned product with its state: dicts (stage, name, key, state, path)."""
    state = load_state(workdir)
    plan = build_plan(state["night_dir"], workdir, config=state["config"] or None,
                      stages=stages)
    rows = [{"stage": "inventory", "name": Path(p).name, "key": "", "state": "failed",
             "path": p} for p, _ in plan.inventory.bad]
    rows += [{"stage": name, "name": "(plan)", "key": "", "state": "failed", "path": ""}
             for name in plan.stage_errors]
    for pu in plan.units.values():
        rows.append({"stage": pu.stage, "name": pu.unit.label, "key": pu.key,
                     "state": plan.state(pu), "path": str(pu.path)})
    return rows


def failure_message(workdir, stage, label, key) -> str | None:
    return read_failure(workdir, stage, label, key)


def plan_report(plan: Plan) -> str:
    """``twinfield plan`` text: the inventory report and the units of every stage."""
    lines = [plan.inventory.report(), "", "Products to make:"]
    by_stage = {}
    for pu in plan.units.values():
        by_stage.setdefault(pu.stage, []).append(pu)
    for stage in plan.stages:
        units = by_stage.get(stage.name, [])
        lines.append(f"  {stage.name:<10s} {len(units):4d} unit(s)  {stage.doc}")
        if stage.name in plan.stage_errors:
            lines.append(f"      PLAN FAILED: {plan.stage_errors[stage.name]}")
        for pu in units:
            if pu.error:
                lines.append(f"      {pu.unit.label}: CANNOT RUN: {pu.error}")
    return "\n".join(lines)

