# SPDX-License-Identifier: BSD-3-Clause
"""Stage ``binary``: per calibrated science exposure, the binary model fitted by a global
chi-square search over the fibre's field and lmfit refinement, with errors and flags.

The search, refinement and bootstraps are kept in ``WORK/binary/refined-cache`` by what
they depend on (``pipeline.binary_product``): a rerun after a change of a threshold or of
the pointing uncertainty only re-summarises them. The directory may be deleted at any
time; it is refilled as needed."""

from __future__ import annotations

import zlib
from dataclasses import dataclass
from pathlib import Path

from pipeline.binary_product import binary_product
from pipeline.inventory import Inventory
from pipeline.stage import Stage, Unit

CACHE_DIR = "refined-cache"


@dataclass(frozen=True)
class BinaryParams:
    search_radius_mas: float = 0.0   # mas, global search radius; 0 = the fibre FWHM at 2.2 um
    step_fraction: float = 0.25      # grid step / (lambda_min / B_max), in (0, 0.25]
    flux_ratio_max: float = 1.5      # largest flux ratio searched (>1 shows mirror solutions)
    fit_slope: bool = False          # fit a power-law spectral slope of the flux ratio
    diameter1_mas: float = 0.0       # mas, uniform-disk diameter of the primary (or start)
    diameter2_mas: float = 0.0       # mas, uniform-disk diameter of the companion (or start)
    fit_diameter1: bool = False      # fit the primary's diameter
    fit_diameter2: bool = False      # fit the companion's diameter
    use_phases: bool = True          # fit calibrated referenced phases (primary offset)
    pointing_sigma_mas: float = 2.0  # mas, 1-sigma per axis of the pair's place in the fibre
                                     # (assumed pointing accuracy); enters flux_ratio_err
    phase_pointing_sigma_mas: float = 0.7  # mas, the same with referenced phases (the
                                     # calibrators' pointing: their phase zero-point)
    n_start: int = 5                 # grid minima refined with lmfit
    n_boot: int = 50                 # bootstrap refits (0 = covariance errors only)
    search_max_channels: int = 32    # channels used by the grid search
    ambiguous_dchi2: float = 10.0    # runner-up closer than this (scaled chi2): flag 1
    chi2_red_min: float = 0.25       # chi2_red below: flag 8
    chi2_red_max: float = 5.0        # chi2_red above: flag 8 (errors scaled by chi2_red > 1)
    seed: int = 20261202             # bootstrap seed; each exposure adds the CRC32 of its label

    def __post_init__(self):
        if self.search_radius_mas < 0 or not 0 < self.step_fraction <= 0.25:
            raise ValueError("search_radius_mas must be >= 0 and step_fraction in (0, 0.25], "
                             f"found {self.search_radius_mas}, {self.step_fraction}")
        if self.flux_ratio_max <= 0 or min(self.diameter1_mas, self.diameter2_mas) < 0:
            raise ValueError("flux_ratio_max must be > 0 and diameters >= 0")
        if self.n_start < 1 or self.n_boot < 0 or self.search_max_channels < 4:
            raise ValueError(f"need n_start >= 1, n_boot >= 0, search_max_channels >= 4; found "
                             f"{self.n_start}, {self.n_boot}, {self.search_max_channels}")
        if min(self.pointing_sigma_mas, self.phase_pointing_sigma_mas) < 0:
            raise ValueError("pointing_sigma_mas and phase_pointing_sigma_mas must be >= 0")
        if not 0 <= self.chi2_red_min < 1 < self.chi2_red_max or self.ambiguous_dchi2 < 0:
            raise ValueError("need 0 <= chi2_red_min < 1 < chi2_red_max, ambiguous_dchi2 >= 0")


def plan(inventory: Inventory, params: BinaryParams, upstream) -> list[Unit]:
    return [Unit(label=u.label, raw=u.raw, needs={"calibrated": ("calibrate", u.label)})
            for u in upstream.get("calibrate", [])]


def run(inputs, params: BinaryParams) -> dict:
    p = params
    fit_kw = dict(step_fraction=p.step_fraction, flux_ratio_max=p.flux_ratio_max,
                  fit_slope=p.fit_slope, diameters_mas=(p.diameter1_mas, p.diameter2_mas),
                  fit_diameters=(p.fit_diameter1, p.fit_diameter2),
                  n_start=p.n_start, search_max_channels=p.search_max_channels,
                  ambiguous_dchi2=p.ambiguous_dchi2,
                  chi2_red_range=(p.chi2_red_min, p.chi2_red_max))
    label = inputs.unit.label
    exposure = inputs.unit.raw[0].rsplit("/", 1)[-1] if inputs.unit.raw else label
    cache = Path(inputs.workdir) / "binary" / CACHE_DIR if inputs.workdir else None
    return binary_product(inputs.products["calibrated"], inputs.instrument, exposure=exposure,
                          search_radius_mas=p.search_radius_mas or None, fit_kw=fit_kw,
                          use_phases=p.use_phases, n_boot=p.n_boot,
                          pointing_sigma_mas=(p.pointing_sigma_mas, p.phase_pointing_sigma_mas),
                          seed=(zlib.crc32(label.encode()) + p.seed) % 2 ** 32, cache_dir=cache)


STAGE = Stage(name="binary", version="7", params=BinaryParams, after=("calibrate",),
              granularity="exposure", plan=plan, run=run, apart=True,
              doc="binary fit per science exposure: global search, lmfit, errors, flags")
