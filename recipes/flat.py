# SPDX-License-Identifier: BSD-3-Clause
"""Stage ``flat``: trace centres and cross-profiles, pixel response and bad-pixel mask
of the science detector, per set-up and polarisation mode, from lamp flats and, when
the night has them, detector flats (``pixel-flat``: the detector lit without traces)."""

from __future__ import annotations

from dataclasses import dataclass

from pipeline.errors import MissingCalibration
from pipeline.inventory import Inventory, dark_label, sci_channel
from pipeline.lampcal import flat_products
from pipeline.stage import Stage, Unit


@dataclass(frozen=True)
class FlatParams:
    centre_deg: int = 2             # polynomial degree of the trace centre y_k(x)
    sigma_deg: int = 2              # polynomial degree of the profile width sigma_k(x)
    spectrum_deg: int = 3           # smoothing degree of the lamp spectrum along x (see toml)
    response_low: float = 0.5       # pixels with a response outside [low, high] are bad
    response_high: float = 1.5
    max_saturated: float = 0.001    # fraction of saturated trace pixels that fails a flat
    frames_per_chunk: int = 16      # frames read at a time (bounded memory)

    def __post_init__(self):
        if not (0 <= self.centre_deg <= 5 and 0 <= self.sigma_deg <= 5
                and 0 <= self.spectrum_deg <= 12):
            raise ValueError("flat polynomial degrees must be in 0..5 (spectrum 0..12)")
        if not 0 < self.response_low < 1 < self.response_high:
            raise ValueError("flat needs 0 < response_low < 1 < response_high")
        if not 0 <= self.max_saturated < 1 or self.frames_per_chunk < 1:
            raise ValueError("flat needs 0 <= max_saturated < 1 and frames_per_chunk >= 1")


def needs_dark(inventory: Inventory, recs, role="dark"):
    """(needs, problem): the dark unit for these records' DIT, or why there is none."""
    key = inventory.dark_for(recs[0])
    if key is None:
        return {}, (recs[0].path, f"no dark of DIT {recs[0].dit:g} s in set-up {recs[0].setup!r}")
    return {role: ("dark", dark_label(*key))}, None


def plan(inventory: Inventory, params: FlatParams, upstream) -> list[Unit]:
    units = []
    for setup, polmode in inventory.channels():
        recs = inventory.select("flat", setup, polmode)
        if not recs:
            continue
        pixel = inventory.select("pixel-flat", setup, polmode)
        needs, problem = needs_dark(inventory, recs)
        if pixel:
            pneeds, pproblem = needs_dark(inventory, pixel, "pixel_dark")
            needs, problem = {**needs, **pneeds}, problem or pproblem
        units.append(Unit(label=sci_channel(setup, polmode),
                          raw=tuple(r.path for r in recs) + tuple(r.path for r in pixel),
                          needs=needs, meta={"setup": setup, "polmode": polmode,
                                             "n_flat": len(recs),
                                             "problem": list(problem or ())}))
    return units


def run(inputs, params: FlatParams) -> dict:
    meta = inputs.unit.meta
    if meta["problem"]:
        raise MissingCalibration(*meta["problem"])
    n_flat = meta["n_flat"]
    return flat_products(inputs.raw[:n_flat], inputs.products["dark"],
                         pixel_flats=inputs.raw[n_flat:],
                         pixel_dark=inputs.products.get("pixel_dark"), instrument=inputs.instrument,
                         setup_name=meta["setup"], polmode=meta["polmode"],
                         frames_per_chunk=params.frames_per_chunk,
                         centre_deg=params.centre_deg, sigma_deg=params.sigma_deg,
                         spectrum_deg=params.spectrum_deg, max_saturated=params.max_saturated,
                         response_range=(params.response_low, params.response_high))


STAGE = Stage(name="flat", version="3", params=FlatParams, after=("dark",),
              granularity="setup", plan=plan, run=run, apart=True,
              doc="trace centres and profiles, pixel response, bad-pixel mask per set-up")
