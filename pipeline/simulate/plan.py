# SPDX-License-Identifier: BSD-3-Clause
"""The night's exposure list: afternoon calibrations, then the on-sky sequence."""

from __future__ import annotations

from dataclasses import dataclass

from astropy.time import Time, TimeDelta

from ..errors import ConfigError
from ..instrument import Instrument
from .scenario import Exposure, Scenario

__all__ = ["Planned", "plan_night"]


@dataclass(frozen=True)
class Planned:
    expno: int
    exp: Exposure
    start: Time
    filename: str


def plan_night(sc: Scenario, inst: Instrument) -> list[Planned]:
    """Afternoon calibrations (darks for every DIT used, flat, optional pixel flat, four single-beam lamp
    exposures and a delay scan per set-up and polarisation mode used on sky) followed by
    the on-sky sequence. Times: back to back with the requested gaps."""
    cal = sc.calibration
    modes = []
    for e in sc.sequence:
        if (e.setup, e.polmode) not in modes:
            modes.append((e.setup, e.polmode))
    for setup, polmode in modes:
        if setup not in inst.setups:
            raise_config(sc, f"set-up {setup!r} is not in the instrument model "
                             f"({sorted(inst.setups)})")
        if polmode not in inst.setups[setup].polarisation:
            raise_config(sc, f"polarisation mode {polmode!r} is not offered by set-up "
                             f"{setup!r} ({list(inst.setups[setup].polarisation)})")
        if setup not in cal:
            raise_config(sc, f"missing section [calibration.{setup}] for set-up {setup!r}")
    dark_n = int(cal.get("dark_nframe", 5))
    calib, dits = [], []
    for setup, polmode in modes:
        c = cal[setup]
        for dit in [c["lamp_dit"], c["scan_dit"]] + [e.dit for e in sc.sequence
                                                     if (e.setup, e.polmode) == (setup, polmode)]:
            if (setup, polmode, dit) not in dits:
                dits.append((setup, polmode, dit))
    for setup, polmode, dit in dits:
        calib.append(Exposure("dark", setup, polmode, dit, dark_n, gap_s=20.0))
    for setup, polmode in modes:
        c = cal[setup]
        calib.append(Exposure("flat", setup, polmode, c["lamp_dit"], c["flat_nframe"], gap_s=20.0))
        if c.get("pixel_flat_nframe", 0) > 0:
            calib.append(Exposure("pixel-flat", setup, polmode, c["lamp_dit"],
                                  c["pixel_flat_nframe"], gap_s=20.0))
        for beam in range(1, 5):
            calib.append(Exposure("lamp-beam", setup, polmode, c["lamp_dit"], c["beam_nframe"],
                                  lamp_beam=beam, gap_s=20.0))
        calib.append(Exposure("lamp-scan", setup, polmode, c["scan_dit"], c["scan_nframe"],
                              gap_s=20.0))
    out = []
    for block, t0 in ((calib, Time(sc.calib_start_utc, scale="utc")),
                      (list(sc.sequence), Time(sc.start_utc, scale="utc"))):
        t = t0
        for i, e in enumerate(block):
            if i:
                t = t + TimeDelta(e.gap_s, format="sec")
            stamp = t.isot[:19].replace(":", "-")
            n = len(out) + 1
            out.append(Planned(n, e, t, f"FF_{stamp}_{e.kind}_{n:04d}.fits"))
            t = t + TimeDelta(e.nframe * e.dit, format="sec")
    return out


def raise_config(sc, problem):
    raise ConfigError(sc.source, problem)
