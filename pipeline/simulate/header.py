# SPDX-License-Identifier: BSD-3-Clause
"""Primary header of a raw exposure (docs/raw_format.md); never any truth."""

from __future__ import annotations

import numpy as np

from .plan import Planned
from .world import World

__all__ = ["primary_cards", "ft_pointing"]


def primary_cards(w: World, p: Planned, tg, ft_pos, rate: float) -> list:
    """The primary header of one exposure: only what the instrument records."""
    e, inst, amb = p.exp, w.inst, w.sc.ambient
    rng = np.random.default_rng([p.expno, 77])
    obj = {"dark": "DARK", "sky": "SKY"}.get(e.kind, tg.name if tg is not None else "LAMP")
    ra = tg.ra_deg if tg is not None else 0.0
    dec = tg.dec_deg if tg is not None else 0.0
    if e.kind == "sky" and tg is not None:
        ra += 20.0 / 3600 / np.cos(np.deg2rad(dec))
    cards = [("DATE-OBS", p.start.isot, "UTC start of the exposure"),
             ("MJD-OBS", float(p.start.mjd), "[d] UTC start of the exposure"),
             ("EXPTIME", e.nframe * e.dit, "[s] NFRAME * SCDIT"),
             ("OBJECT", obj, "target"), ("RA", ra, "[deg] science fibre, commanded"),
             ("DEC", dec, "[deg] science fibre, commanded"), ("RADESYS", "ICRS", ""),
             ("TELESCOP", "KESSA-4T", ""), ("INSTRUME", "FOURFOLD", ""),
             ("FRAMEKND", e.kind, "frame kind"), ("SPECSET", e.setup, "spectrometer set-up"),
             ("POLMODE", e.polmode, "polarisation mode"),
             ("SCDIT", e.dit, "[s] science frame integration"),
             ("NFRAME", e.nframe, "science frames"),
             ("FTPERIOD", inst.fringe_tracker.frame_period_s, "[s] fringe-tracker frame period"),
             ("LAMPTEL", e.lamp_beam, "lit beam (lamp-beam), else 0")]
    cards += [(f"STATION{i + 1}", s.name, f"station of beam {i + 1}")
              for i, s in enumerate(inst.stations)]
    on_sky = e.kind in ("sky", "calibrator", "science")
    cards += [("FTOBJECT", tg.ft_name if on_sky and e.kind != "sky" else "NONE", "FT star"),
              ("FTRA", ft_pos[0], "[deg] fringe-tracker fibre, commanded"),
              ("FTDEC", ft_pos[1], "[deg] fringe-tracker fibre, commanded")]
    if e.kind == "calibrator":
        cards += [("CALDIAM", w.sc.targets[tg.name].cal_diameter_mas, "[mas] catalogue UD diameter"),
                  ("CALDIAME", w.sc.targets[tg.name].cal_diameter_err_mas, "[mas] its error")]
    cards += [("AMBTEMP", round(amb["temperature_c"] + rng.normal(0, 0.3), 2), "[deg C]"),
              ("AMBPRES", round(amb["pressure_hpa"] + rng.normal(0, 0.5), 1), "[hPa]"),
              ("AMBHUM", round(amb["humidity_pct"] + rng.normal(0, 1.0), 1), "[%]"),
              ("SEEING", round(amb["seeing_arcsec"] * np.exp(rng.normal(0, 0.1)), 2),
               "[arcsec] at 0.5 um, zenith"),
              ("COHTIME", round(amb["coherence_time_ms"] * np.exp(rng.normal(0, 0.1)), 2),
               "[ms] at 0.5 um"),
              ("EXPNO", p.expno, "exposure number in the night")]
    if e.kind == "lamp-scan":
        cards.append(("SCANRATE", rate, "[m/s] scan speed of beam 4"))
    return cards


def ft_pointing(tg):
    """Commanded FT fibre position (deg) for a target: FT star offset in arcsec (E, N)."""
    dec = tg.dec_deg + tg.ft_offset_arcsec[1] / 3600
    ra = tg.ra_deg + tg.ft_offset_arcsec[0] / 3600 / np.cos(np.deg2rad(tg.dec_deg))
    return ra, dec
