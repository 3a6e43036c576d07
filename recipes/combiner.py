# SPDX-License-Identifier: BSD-3-Clause
"""Stage ``combiner``: transmissions, contrasts and phase shifts of the 24 outputs from
single-beam and delay-scan lamp frames, the visibility-to-pixel matrix and its
noise-weighted inverse, per science set-up and polarisation mode and for the fringe tracker."""

from __future__ import annotations

from dataclasses import dataclass

from pipeline.errors import MissingCalibration
from pipeline.inventory import Inventory, ft_dark_label, sci_channel
from pipeline.lampcal import combiner_ft, combiner_science
from pipeline.stage import Stage, Unit
from recipes.flat import needs_dark
from recipes.wavecal import ft_scan_record


@dataclass(frozen=True)
class CombinerParams:
    frames_per_chunk: int = 16      # frames read at a time (bounded memory)
    window: float = 0.5             # fringe phasors fitted within this many coherence lengths
    transmission_deg: int = 3       # polynomial in wavelength through the science shares; -1 off

    def __post_init__(self):
        if self.frames_per_chunk < 1 or self.window <= 0 or self.transmission_deg < -1:
            raise ValueError("combiner needs frames_per_chunk >= 1, window > 0 and "
                             "transmission_deg >= -1")


def plan(inventory: Inventory, params: CombinerParams, upstream) -> list[Unit]:
    cals = {u.label for u in upstream.get("wavecal", [])}
    units = []
    for setup, polmode in inventory.channels():
        label = sci_channel(setup, polmode)
        beams = inventory.select("lamp-beam", setup, polmode)
        scans = inventory.select("lamp-scan", setup, polmode)
        if label not in cals:
            continue
        nb, pb = needs_dark(inventory, beams, "dark_beam") if beams else ({}, None)
        ns, ps = needs_dark(inventory, scans[-1:], "dark_scan")
        problem = pb or ps or (() if beams else (scans[-1].path, f"no lamp-beam in {label}"))
        units.append(Unit(label=label, raw=tuple(r.path for r in beams) + (scans[-1].path,),
                          needs={**nb, **ns, "flat": ("flat", label), "wavecal": ("wavecal", label)},
                          meta={"channel": "sci", "setup": setup, "polmode": polmode,
                                "problem": list(problem)}))
    rec = ft_scan_record(inventory)
    if rec is not None and "ft" in cals:
        beams = inventory.select("lamp-beam", rec.setup, rec.polmode)
        key = inventory.ft_dark_for(rec)
        units.append(Unit(label="ft", raw=tuple(r.path for r in beams) + (rec.path,),
                          needs={"ft_dark": ("dark", ft_dark_label(key)), "wavecal": ("wavecal", "ft")},
                          meta={"channel": "ft", "problem": [] if beams else
                                [rec.path, "no lamp-beam exposures for the fringe tracker"]}))
    return units


def run(inputs, params: CombinerParams) -> dict:
    meta, p = inputs.unit.meta, inputs.products
    if meta["problem"]:
        raise MissingCalibration(*meta["problem"])
    *beams, scan = inputs.raw
    if meta["channel"] == "ft":
        return combiner_ft(beams, scan, ft_dark=p["ft_dark"], wavecal=p["wavecal"],
                           instrument=inputs.instrument, window=params.window)
    return combiner_science(beams, scan, dark_beam=p["dark_beam"], dark_scan=p["dark_scan"],
                            flat=p["flat"], wavecal=p["wavecal"], instrument=inputs.instrument,
                            setup_name=meta["setup"], polmode=meta["polmode"],
                            window=params.window, frames_per_chunk=params.frames_per_chunk,
                            transmission_deg=params.transmission_deg)


STAGE = Stage(name="combiner", version="7", params=CombinerParams, after=("dark", "flat", "wavecal"),
              granularity="setup", plan=plan, run=run, apart=True,
              doc="transmissions, contrasts, phase shifts, visibility-to-pixel matrix and inverse")
