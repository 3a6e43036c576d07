# SPDX-License-Identifier: BSD-3-Clause
"""Stage ``extract``: per on-sky exposure, fluxes and coherent fluxes of both channels."""

from __future__ import annotations

from dataclasses import dataclass

from pipeline.errors import MissingCalibration
from pipeline.extract_frames import exposure_facts, extract_ft, extract_science, sky_background
from pipeline.inventory import Inventory, dark_label, ft_dark_label, sci_channel
from pipeline.stage import Stage, Unit


@dataclass(frozen=True)
class ExtractParams:
    frames_per_chunk: int = 8        # science frames extracted at once (memory ~ chunk)
    ft_frames_per_chunk: int = 4096  # fringe-tracker frames per dask chunk
    clip: float = 6.0                # cosmic-ray rejection in optimal extraction, sigmas (> 3)
    subtract_sky: bool = True        # use the nearest sky of the same set-up and DIT if any

    def __post_init__(self):
        if not 1 <= self.frames_per_chunk <= 1024:
            raise ValueError(f"frames_per_chunk must be in 1..1024, found {self.frames_per_chunk}")
        if not 64 <= self.ft_frames_per_chunk <= 1_000_000:
            raise ValueError("ft_frames_per_chunk must be in 64..1000000, "
                             f"found {self.ft_frames_per_chunk}")
        if not self.clip > 3:
            raise ValueError(f"clip must be > 3 sigmas, found {self.clip}")


def plan(inventory: Inventory, params: ExtractParams, upstream) -> list[Unit]:
    planned = {(st, u.label) for st, us in upstream.items() for u in us}
    units = []
    for rec in inventory.select(("science", "calibrator", "sky")):
        ch = sci_channel(rec.setup, rec.polmode)
        skies = [] if rec.kind == "sky" or not params.subtract_sky else sorted(
            inventory.select("sky", rec.setup, rec.polmode, rec.dit),
            key=lambda s: abs(s.mjd - rec.mjd))
        dk = inventory.dark_for(rec)
        wanted = {"dark": ("dark", dark_label(*dk) if dk else dark_label(rec.setup, rec.polmode,
                                                                          rec.dit)),
                  "ft_dark": ("dark", ft_dark_label(rec.ft_period)), "flat": ("flat", ch),
                  "wavecal": ("wavecal", ch), "combiner": ("combiner", ch),
                  "ft_combiner": ("combiner", "ft"), "ft_wavecal": ("wavecal", "ft")}
        needs = {role: need for role, need in wanted.items() if need in planned}
        missing = [f"{s}/{lab}" for role, (s, lab) in wanted.items()
                   if role not in needs and role != "ft_wavecal"]
        units.append(Unit(label=rec.name, raw=(rec.path,) + tuple(s.path for s in skies[:1]),
                          needs=needs, meta={"kind": rec.kind, "setup": rec.setup,
                                             "polmode": rec.polmode, "missing": missing}))
    return units


def run(inputs, params: ExtractParams) -> dict:
    raw, prods, inst = inputs.raw[0], inputs.products, inputs.instrument
    if inputs.unit.meta.get("missing"):
        raise MissingCalibration(raw.path, "no calibration product "
                                           f"{', '.join(inputs.unit.meta['missing'])}")
    sky = inputs.raw[1] if len(inputs.raw) > 1 else None
    out = extract_science(raw, dark=prods["dark"], flat=prods["flat"], wavecal=prods["wavecal"],
                          combiner=prods["combiner"], instrument=inst,
                          background=sky_background(sky) if sky is not None else None,
                          background_frames=sky.nframe if sky is not None else None,
                          frames_per_chunk=params.frames_per_chunk, clip=params.clip)
    ft_comb = prods["ft_combiner"]
    ft_wave = (ft_comb["wave"] if "wave" in ft_comb else prods["ft_wavecal"]["wave_grid"]
               if "ft_wavecal" in prods else inst.fringe_tracker.nominal_wavelength_m())
    out.update(extract_ft(raw, ft_dark=prods["ft_dark"], ft_combiner=ft_comb, ft_wave=ft_wave,
                          instrument=inst, ft_frames_per_chunk=params.ft_frames_per_chunk))
    out.update(exposure_facts(raw, inst))
    out["sky_file"] = sky.path if sky is not None else ""
    return out


STAGE = Stage(name="extract", version="3", params=ExtractParams,
              after=("dark", "flat", "wavecal", "combiner"), granularity="exposure",
              plan=plan, run=run, apart=True,
              doc="per on-sky exposure: sky/dark subtraction, optimal extraction, P2VM -> "
                  "fluxes and coherent fluxes of the science and fringe-tracker channels")
