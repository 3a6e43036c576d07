# SPDX-License-Identifier: BSD-3-Clause
"""What a stage declares, and what its run function receives and returns.

A recipe module in ``recipes/`` builds one :class:`Stage`. The engine
(``pipeline/engine.py``) knows nothing of physics: it asks each stage for its
units of work (``plan``), keys each unit by content, and calls ``run`` with an
:class:`Inputs` for every unit whose product is not current. Stages know
nothing of HDF5: ``run`` returns a mapping of names to :class:`Array` (or plain
numpy arrays) and JSON-able attributes; the store writes them.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable, Literal, Mapping

import numpy as np

__all__ = ["Stage", "Unit", "Inputs", "Array", "Granularity"]

Granularity = Literal["night", "setup", "exposure"]


@dataclass(frozen=True)
class Array:
    """An output array with its named axes and unit, e.g.
    ``Array(v2, axes=("pol", "baseline", "wave"), unit="")``.

    ``data`` may be a numpy or a dask array (written in chunks) or a numpy
    structured array (a table, axes ``("row",)``).
    """
    data: Any
    axes: tuple[str, ...]
    unit: str = ""
    doc: str = ""

    def __post_init__(self):
        ndim = getattr(self.data, "ndim", np.ndim(self.data))
        if len(self.axes) != ndim:
            raise ValueError(f"Array has {ndim} dimensions but {len(self.axes)} axis names "
                             f"{self.axes}")


@dataclass(frozen=True)
class Unit:
    """One unit of work of a stage: one product file.

    Attributes
    ----------
    label : str
        Unique within the stage, file-name safe (e.g. ``medium-joint-dit1.0``
        or the raw exposure's file stem).
    raw : tuple of str
        Raw files (absolute paths) this unit reads.
    needs : mapping role -> (stage name, unit label)
        Upstream products this unit reads, by role.
    meta : mapping
        Small JSON-able facts the run function needs (set-up, DIT, kind...).
        Part of the content key.
    """
    label: str
    raw: tuple[str, ...] = ()
    needs: Mapping[str, tuple[str, str]] = field(default_factory=dict)
    meta: Mapping[str, Any] = field(default_factory=dict)


@dataclass
class Inputs:
    """What ``Stage.run`` receives.

    Attributes
    ----------
    unit : Unit
    raw : list of pipeline.rawio.RawExposure (opened lazily, same order as unit.raw)
    products : mapping role -> pipeline.store.ProductView
        ``view["name"]`` gives a numpy array, ``view.dask("name")`` a chunked dask
        array, ``view.attrs`` the product's attributes, ``view.path`` its file.
    instrument : pipeline.instrument.Instrument
    workdir : pathlib.Path, for stages that also write files meant for people
        (OIFITS, tables, report)
    """
    unit: Unit
    raw: list
    products: Mapping[str, Any]
    instrument: Any
    workdir: Any = None
    failed: Mapping[str, str] = field(default_factory=dict)
    """Only for stages declared ``partial``: role -> message of each upstream unit that
    failed (absent from ``products``)."""


@dataclass(frozen=True)
class Stage:
    """A stage's declaration.

    Attributes
    ----------
    name : str, e.g. ``"dark"``; products are ``WORK/<name>/<label>.<key>.h5``
    version : str; bump it when the stage's output changes for the same input
    params : type, a frozen dataclass; defaults in the fields, overrides from TOML
    after : tuple of str, upstream stage names (graph order)
    granularity : "night" | "setup" | "exposure"
    plan : callable(inventory, params, upstream) -> list[Unit]
        ``inventory`` is a pipeline.inventory.Inventory; ``upstream`` maps each
        upstream stage name to its list of Units (to wire ``needs``).
    run : callable(Inputs, params) -> dict[str, Array | ndarray | scalar | str]
        Arrays become datasets; scalars and strings become attributes.
    doc : str, one line for ``twinfield plan`` and the docs
    partial : bool
        Night-level summaries (tables, report) set this: the unit runs with the upstream
        products that exist, and the failed ones are listed in ``Inputs.failed`` instead
        of failing the unit. Such a product is stale again as soon as a missing input
        appears.
    apart : bool
        Under the threads scheduler, run the stage's units in helper processes (see
        ``engine._Helpers``) rather than on the reducing process's threads. Units on
        threads stall each other: pure-Python loops and matplotlib hold the GIL most of
        their time, and numpy-heavy units hold it between their numpy calls. Every stage
        of a reduction but ``inventory`` sets it (measured in docs/benchmarks.md). Same
        products either way.
    """
    name: str
    version: str
    params: type
    after: tuple[str, ...]
    granularity: Granularity
    plan: Callable
    run: Callable
    doc: str = ""
    partial: bool = False
    apart: bool = False
