# SPDX-License-Identifier: BSD-3-Clause
"""Stage ``tables``: the night's astrometry, one row per science exposure, as
``WORK/astrometry.ecsv``, ``.fits`` and ``.csv``."""

from __future__ import annotations

from dataclasses import dataclass

from pipeline import __version__
from pipeline.astrometry_table import (astrometry_table, config_hash, row_from_binary,
                                       write_astrometry)
from pipeline.binary_product import FLAG_DOC
from pipeline.errors import NothingToDo
from pipeline.inventory import Inventory
from pipeline.stage import Array, Stage, Unit


@dataclass(frozen=True)
class TablesParams:
    write_files: bool = True   # write WORK/astrometry.{ecsv,fits,csv} (False: product only)


def plan(inventory: Inventory, params: TablesParams, upstream) -> list[Unit]:
    labels = [u.label for u in upstream.get("binary", [])]
    return [Unit(label="night", needs={f"exp{k}": ("binary", lab)
                                       for k, lab in enumerate(labels)})]


def run(inputs, params: TablesParams) -> dict:
    views = list(inputs.products.values())     # failed fits are absent (partial stage)
    if not views:
        raise NothingToDo("no science exposure was fitted")
    table = astrometry_table([row_from_binary(v.attrs) for v in views],
                             code_version=__version__, config=config_hash(v.key for v in views),
                             flag_doc=FLAG_DOC)
    table.meta["NOTREDUC"] = "; ".join(sorted(inputs.failed.values()))  # failed upstream
    files = write_astrometry(table, inputs.workdir) if params.write_files else {}
    return {"astrometry": Array(table.as_array(), ("row",), "", "the astrometry table"),
            "files": files, "n_rows": len(table), "config_hash": table.meta["CFGHASH"],
            "failed_inputs": table.meta["NOTREDUC"]}


STAGE = Stage(name="tables", version="1", params=TablesParams, after=("binary",),
              granularity="night", plan=plan, run=run, apart=True, partial=True,
              doc="per-night astrometry tables (ECSV, FITS, CSV) for orbit fitters")
