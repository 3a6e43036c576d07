# SPDX-License-Identifier: BSD-3-Clause
"""Stage ``merge``: one OIFITS v2 file per target and night,
``WORK/oifits/<target>_<date>.fits``, from every calibrated science exposure."""

from __future__ import annotations

import re
from dataclasses import dataclass

from pipeline.errors import NothingToDo
from pipeline.inventory import Inventory
from pipeline.observables import array_for, oifits_observations
from pipeline.oifits import write_oifits
from pipeline.stage import Stage, Unit


@dataclass(frozen=True)
class MergeParams:
    enabled: bool = True     # write the merged per-target files


def plan(inventory: Inventory, params: MergeParams, upstream) -> list[Unit]:
    labels = [u.label for u in upstream.get("calibrate", [])]
    if not params.enabled or not labels:
        return []
    return [Unit(label="night", needs={f"exp{k}": ("calibrate", lab)
                                       for k, lab in enumerate(labels)})]


def run(inputs, params: MergeParams) -> dict:
    views = list(inputs.products.values())     # failed exposures are absent (partial stage)
    if not views:
        raise NothingToDo("no science exposure was calibrated")
    by_target = {}
    for v in views:
        by_target.setdefault(str(v.attrs["object"]), []).append(v)
    written = []
    for target, group in sorted(by_target.items()):
        obs = [o for v in group for o in oifits_observations(v)]
        date = min(str(v.attrs["date_obs"]) for v in group)[:10]
        stem = re.sub(r"[^A-Za-z0-9._+-]+", "_", target).strip("_") or "target"
        written.append(str(write_oifits(inputs.workdir / "oifits" / f"{stem}_{date}.fits", obs,
                                        array_for(group[0], inputs.instrument))))
    return {"files": written, "n_exposures": len(views),
            "failed_inputs": "\n".join(sorted(inputs.failed.values()))}


STAGE = Stage(name="merge", version="1", params=MergeParams, after=("calibrate",),
              granularity="night", plan=plan, run=run, apart=True, partial=True,
              doc="one merged OIFITS v2 file per target and night")
