# SPDX-License-Identifier: BSD-3-Clause
"""Everything fixed for one night: the true instrument, detectors, targets, lamp,
metrology zero points and drift, and the constants of the time sampling."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
from astropy.time import Time

from ..instrument import Instrument
from ..skymodel import MAS
from .detector import make_detector, trace_profiles
from .scenario import Scenario
from .sky import planck_photon_shape
from .truth_instrument import draw_combiner, ft_channel, science_channel

__all__ = ["World", "SCAN_RATIOS", "SIDEREAL_RATE", "N_SUB_T", "COARSE_WAVE"]

SCAN_RATIOS = np.array([0.0, 1 / 3, 2 / 3, 1.0])
"""Scan speed of beams 1..4 relative to beam 4: baseline OPD speeds 1/3, 2/3 and 1. Evenly
spaced ratios give the slowest baseline the largest share of the fastest one's OPD range
(a third), so every baseline's fringe envelope is measured within one scan."""
SIDEREAL_RATE = 2 * np.pi * 1.00273781191 / 86400.0   # rad of hour angle per second of UTC
N_SUB_T = 4                                            # time samples per fringe-tracker frame
COARSE_WAVE = np.linspace(1.85e-6, 2.55e-6, 36)        # grid of frame-averaged phasors


class World:
    """Everything fixed for the night: true instrument, detectors, targets, constants."""

    def __init__(self, sc: Scenario, inst: Instrument, seed: int, plan):
        rng = np.random.default_rng([seed, 0])
        self.sc, self.inst = sc, inst
        err = sc.errors
        n_sub = sc.sampling["sub_samples"]
        self.laws = {"joint": (draw_combiner(inst, err, rng),),
                     "split": (draw_combiner(inst, err, rng, t_scale=0.5),
                               draw_combiner(inst, err, rng, t_scale=0.5))}
        self.ft_law = draw_combiner(inst, err, rng)
        self.ft = ft_channel(inst, self.ft_law, err, rng, sc.sampling["ft_sub_samples"])
        self.channels = {}
        for p in plan:
            key = (p.exp.setup, p.exp.polmode)
            if key not in self.channels:
                self.channels[key] = science_channel(inst, p.exp.setup, p.exp.polmode,
                                                     self.laws[p.exp.polmode], err, rng, n_sub)
        dsc = inst.detectors["science"]
        dk = sc.detector
        self.sci_det = make_detector(dsc, (dsc.n_y, dsc.n_x_max), rng,
                                     response_rms=err["pixel_response_rms"],
                                     bias_pattern=dk["bias_pattern_adu"],
                                     hot_dark=dk["hot_dark_e_per_s"], cosmic_e=dk["cosmic_e"])
        ftd = inst.detectors[inst.fringe_tracker.detector]
        self.ft_det = make_detector(ftd, (inst.combiner.n_output, inst.fringe_tracker.n_wave),
                                    rng, response_rms=err["ft_pixel_response_rms"],
                                    bias_pattern=dk["bias_pattern_adu"],
                                    hot_dark=dk["hot_dark_e_per_s"], cosmic_e=dk["cosmic_e"])
        self.profiles = {k: trace_profiles(ch.trace_y, ch.trace_sigma, dsc.n_y)
                         for k, ch in self.channels.items()}
        self.lamp_beam = 1 + sc.lamp["beam_scatter"] * rng.uniform(-1, 1, 4)
        m = sc.metrology
        self.metro_zero = m["zero_offset_um"] * 1e-6 * rng.uniform(-1, 1, 4)
        self.drift_amp = m["drift_um"] * 1e-6 * rng.uniform(0.3, 1.0, 4)
        self.drift_period = rng.uniform(3, 8, 4) * 3600.0
        self.drift_phase = rng.uniform(0, 2 * np.pi, 4)
        self.night_t0 = Time(sc.start_utc, scale="utc")
        self.targets = {}
        for name, tg in sc.targets.items():
            if tg.cal_diameter_mas > 0:
                d = max(0.0, rng.normal(tg.cal_diameter_mas, tg.cal_diameter_err_mas))
                tg = replace(tg, diameter_mas=d)
            self.targets[name] = tg
        self.area = np.pi * (inst.telescope_diameter_m / 2) ** 2
        self.fibre_fwhm = inst.fibre_fwhm_mas_at_2p2um * MAS

    def drift(self, t_night):
        """Slow drift of the internal differential path, (n, 4) metres."""
        t = np.asarray(t_night, float)[:, None]
        return self.drift_amp * np.sin(2 * np.pi * t / self.drift_period + self.drift_phase)

    # spectral densities (photons s^-1 m^-1)
    def lamp(self, wave, ft=False):
        L = self.sc.lamp
        f = L["ft_factor"] if ft else 1.0
        return L["photon_rate_per_nm"] * 1e9 * f * planck_photon_shape(wave, L["temperature_k"])

    def background(self, wave):
        return self.sc.photometry["sky_background_per_nm"] * 1e9 * planck_photon_shape(wave, 285.0)
