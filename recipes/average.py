# SPDX-License-Identifier: BSD-3-Clause
"""Stage ``average``: per on-sky exposure, bias-corrected V2, closure phases, referenced
visibilities and photometry with bootstrap errors over frames."""

from __future__ import annotations

from dataclasses import dataclass

from pipeline.inventory import Inventory, sci_channel
from pipeline.observables import average_product
from pipeline.stage import Stage, Unit


@dataclass(frozen=True)
class AverageParams:
    n_boot: int = 200               # bootstrap resamples over frames (errors, covariances)
    seed: int = 20261202            # base seed; each exposure adds the CRC32 of its label
    use_contrast_loss: bool = True  # divide out the per-frame contrast loss (reference product)

    def __post_init__(self):
        if not 20 <= self.n_boot <= 20000:
            raise ValueError(f"n_boot must be in 20..20000, found {self.n_boot}")
        if self.seed < 0:
            raise ValueError(f"seed must be >= 0, found {self.seed}")


def plan(inventory: Inventory, params: AverageParams, upstream) -> list[Unit]:
    wavecal = {u.label for u in upstream.get("wavecal", [])}
    units = []
    for rec in inventory.select(("science", "calibrator")):
        needs = {"extract": ("extract", rec.name), "reference": ("reference", rec.name)}
        channel = sci_channel(rec.setup, rec.polmode)
        if channel in wavecal:
            needs["wavecal"] = ("wavecal", channel)
        units.append(Unit(label=rec.name, raw=(rec.path,), needs=needs,
                          meta={"kind": rec.kind, "setup": rec.setup, "polmode": rec.polmode}))
    return units


def run(inputs, params: AverageParams) -> dict:
    prods = inputs.products
    wavecal = prods.get("wavecal")
    band = (wavecal["bandwidth_grid"]
            if wavecal is not None and "bandwidth_grid" in wavecal else None)
    band_bl = (wavecal["bandwidth_baseline"]
               if wavecal is not None and "bandwidth_baseline" in wavecal else None)
    return average_product(prods["extract"], prods["reference"], inputs.raw[0].header,
                           inputs.instrument, label=inputs.unit.label, n_boot=params.n_boot,
                           seed=params.seed, use_contrast_loss=params.use_contrast_loss,
                           band_m=band, band_baseline_m=band_bl)


STAGE = Stage(name="average", version="2", params=AverageParams,
              after=("extract", "reference"), granularity="exposure", plan=plan, run=run,
              apart=True,
              doc="per exposure: bias-corrected V2, closure phases, referenced visibilities, "
                  "photometry, bootstrap errors")
