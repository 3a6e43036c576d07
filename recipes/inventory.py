# SPDX-License-Identifier: BSD-3-Clause
"""Stage ``inventory``: the night's files classified by header, kept as a table."""

from __future__ import annotations

from dataclasses import dataclass

from pipeline.inventory import Inventory, Record
from pipeline.stage import Array, Stage, Unit


@dataclass(frozen=True)
class InventoryParams:
    strict: bool = False   # refuse to reduce (exit 3) when any calibration is missing
    n_calibrators: int = 2  # calibrator exposures associated to each science exposure

    def __post_init__(self):
        if self.n_calibrators < 1:
            raise ValueError(f"n_calibrators must be >= 1, found {self.n_calibrators}")


def plan(inventory: Inventory, params: InventoryParams, upstream) -> list[Unit]:
    return [Unit(label="night", raw=tuple(r.path for r in inventory.records),
                 meta={"night_dir": inventory.night_dir,
                       "bad": [list(b) for b in inventory.bad],
                       "problems": [list(p) for p in inventory.problems()]})]


def run(inputs, params: InventoryParams) -> dict:
    inv = Inventory(inputs.unit.meta["night_dir"], [Record.from_raw(r) for r in inputs.raw])
    return {"files": Array(inv.table(), axes=("row",), doc="one row per readable raw file"),
            "bad": inputs.unit.meta["bad"], "problems": inputs.unit.meta["problems"],
            "n_files": len(inv.records)}


STAGE = Stage(name="inventory", version="1", params=InventoryParams, after=(),
              granularity="night", plan=plan, run=run,
              doc="classify raw files by header, associate calibrations, list what is missing")
