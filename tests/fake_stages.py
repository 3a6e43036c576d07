# SPDX-License-Identifier: BSD-3-Clause
"""Two small stages for engine tests (no physics): one downstream of every science dark,
and one whose product is written slowly, chunk by chunk (to be killed mid-write)."""

import os
import time
from dataclasses import dataclass
from pathlib import Path

import dask
import dask.array as da
import numpy as np

from pipeline.stage import Array, Stage, Unit


@dataclass(frozen=True)
class ConsumerParams:
    scale: float = 1.0  # multiplies the dark level


def _consumer_plan(inventory, params, upstream):
    return [Unit(label=u.label, needs={"dark": ("dark", u.label)})
            for u in upstream.get("dark", []) if u.meta["channel"] == "sci"]


def _consumer_run(inputs, params):
    level = float(np.nanmedian(inputs.products["dark"]["master"]))
    return {"level": Array(np.array([level * params.scale]), ("one",), "adu")}


CONSUMER = Stage("consumer", "1", ConsumerParams, ("dark",), "setup", _consumer_plan,
                 _consumer_run)


@dataclass(frozen=True)
class SlowParams:
    n_block: int = 6   # blocks of the slow product


def _slow_plan(inventory, params, upstream):
    darks = [u for u in upstream.get("dark", []) if u.meta["channel"] == "sci"]
    return [Unit(label="all", needs={f"d{i}": ("dark", u.label) for i, u in enumerate(darks)})]


def _block(i):
    marker = os.environ.get("TWINFIELD_TEST_MARKER")
    if marker and i == 2:
        Path(marker).write_text("writing")
        time.sleep(60)      # killed here, with a partly written temporary file
    return np.full((1, 1000), float(i))


def _slow_run(inputs, params):
    blocks = [da.from_delayed(dask.delayed(_block)(i), (1, 1000), float)
              for i in range(params.n_block)]
    return {"ramp": Array(da.concatenate(blocks), ("row", "col"))}


SLOW = Stage("slow", "1", SlowParams, ("dark",), "night", _slow_plan, _slow_run)


@dataclass(frozen=True)
class SummaryParams:
    pass


def _summary_plan(inventory, params, upstream):
    return [Unit(label="night", needs={f"c{i}": ("consumer", u.label)
                                       for i, u in enumerate(upstream.get("consumer", []))})]


def _summary_run(inputs, params):
    levels = [float(v["level"][0]) for v in inputs.products.values()]
    return {"levels": Array(np.array(levels), ("unit",), "adu"),
            "failed": "\n".join(sorted(inputs.failed.values()))}


SUMMARY = Stage("summary", "1", SummaryParams, ("consumer",), "night", _summary_plan,
                _summary_run, partial=True)
"""A night-level summary that runs with whatever upstream units succeeded."""


def _crasher_plan(inventory, params, upstream):
    darks = sorted(u.label for u in upstream.get("dark", []) if u.meta["channel"] == "sci")
    return [Unit(label=label, needs={"dark": ("dark", label)}, meta={"crash": k == 0})
            for k, label in enumerate(darks)]


def _crasher_run(inputs, params):
    if inputs.unit.meta["crash"]:
        os._exit(3)          # the worker process dies, as if killed or crashed in C
    return _consumer_run(inputs, params)


CRASHER = Stage("crasher", "1", ConsumerParams, ("dark",), "setup", _crasher_plan,
                _crasher_run)


def _where_run(inputs, params):
    return {**_consumer_run(inputs, params), "pid": os.getpid()}


WHERE = Stage("where", "1", ConsumerParams, ("dark",), "setup", _consumer_plan, _where_run,
              apart=True)
"""The consumer, run in helper processes (``Stage.apart``); records the process id."""

APART_CRASHER = Stage("apartcrash", "1", ConsumerParams, ("dark",), "setup", _crasher_plan,
                      _crasher_run, apart=True)
"""The crasher, run in helper processes: its first unit kills its process."""
