# SPDX-License-Identifier: BSD-3-Clause
"""Simulate one night: plan the exposures, draw the true instrument, write every raw file
and ``truth.json``.

Entry point: :func:`simulate_night`. The phase model is the one of DEVELOPERS.md:
science coherent flux ~ V_sc exp(-2 pi i (r_j - r_i + d_j - d_i) / lambda), fringe tracker
~ V_ft exp(-2 pi i (r_j - r_i) / lambda), d_i = w_i(s_sc) - w_i(s_ft) + m_i with the
internal path m_i = -(w_i(s_sc) - w_i(s_ft)) + drift_i, metrology PATH_i = m_i + c_i + noise.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
from astropy.time import Time, TimeDelta

from ..geometry import hour_angle_rad, uvw_from_enu
from ..instrument import Instrument, load_instrument
from ..skymodel import MAS, fibre_coupling
from .combine import detected
from .detector import make_detector, read_out, trace_profiles
from .scenario import Exposure, Scenario, load_scenario
from .sky import Component, coupled_sky, field_components, planck_photon_shape, star_photon_density
from .truth_instrument import draw_combiner, ft_channel, science_channel
from .turbulence import injection, residuals
from .writer import write_exposure

__all__ = ["simulate_night", "plan_night", "SCAN_RATIOS"]

SCAN_RATIOS = np.array([0.0, 1 / 7, 3 / 7, 1.0])
"""Scan speed of beams 1..4 relative to beam 4: baseline OPD speeds 1..7 /7, all distinct."""
SIDEREAL_RATE = 2 * np.pi * 1.00273781191 / 86400.0   # rad of hour angle per second of UTC
N_SUB_T = 4                                            # time samples per fringe-tracker frame
COARSE_WAVE = np.linspace(1.85e-6, 2.55e-6, 36)        # grid of frame-averaged phasors
ARCSEC = np.pi / 180 / 3600


@dataclass(frozen=True)
class Planned:
    expno: int
    exp: Exposure
    start: Time
    filename: str


def plan_night(sc: Scenario, inst: Instrument) -> list[Planned]:
    """Afternoon calibrations (darks for every DIT used, flat, four single-beam lamp
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
    from ..errors import ConfigError
    raise ConfigError(sc.source, problem)


class _World:
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


def _cards(w: _World, p: Planned, tg, ft_pos, rate, header_extra):
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
    return cards + header_extra


def _ft_pointing(tg):
    """Commanded FT fibre position (deg) for a target: FT star offset in arcsec (E, N)."""
    dec = tg.dec_deg + tg.ft_offset_arcsec[1] / 3600
    ra = tg.ra_deg + tg.ft_offset_arcsec[0] / 3600 / np.cos(np.deg2rad(tg.dec_deg))
    return ra, dec


def _interp_baseline(gamma, coarse, wave, baseline):
    """Frame-averaged phasors gamma (frame, baseline, coarse) -> (frame, trace, pix, sub)."""
    out = np.empty((gamma.shape[0],) + wave.shape, complex)
    for f in range(gamma.shape[0]):
        for b in np.unique(baseline):
            sel = baseline == b
            out[f, sel] = (np.interp(wave[sel], coarse, gamma[f, b].real)
                           + 1j * np.interp(wave[sel], coarse, gamma[f, b].imag))
    return out


def _simulate_exposure(w: _World, p: Planned, night: Path, seed: int) -> dict:
    e, inst, sc = p.exp, w.inst, w.sc
    rng = np.random.default_rng([seed, p.expno])
    ch = w.channels[(e.setup, e.polmode)]
    prof = w.profiles[(e.setup, e.polmode)]
    ft = w.ft
    period = inst.fringe_tracker.frame_period_s
    pair, ftpair = ch.pair, ft.pair
    duration = e.nframe * e.dit
    t_start = np.arange(e.nframe) * e.dit
    t_mid = t_start + e.dit / 2
    on_sky = e.kind in ("sky", "calibrator", "science")
    ft_duration = duration if on_sky or e.kind == "lamp-scan" else min(
        duration, sc.sampling["calib_ft_max_s"])
    n_ft = max(1, int(round(ft_duration / period)))
    ft_time = (np.arange(n_ft) + 1) * period
    truth = {"kind": e.kind, "expno": p.expno, "setup": e.setup, "polmode": e.polmode,
             "channel": ch.label, "dit_s": e.dit, "nframe": e.nframe, "date_obs": p.start.isot}
    tg = w.targets.get(e.target) if e.target else None
    ft_pos = _ft_pointing(tg) if tg is not None and on_sky else (0.0, 0.0)
    wave, ftwave = ch.fine_wave, ft.fine_wave
    rate = 0.0
    metrology = None
    chunk = sc.sampling["chunk_frames"]
    n_t = n_ft * N_SUB_T
    dt = period / N_SUB_T

    # ---- per-kind light model: functions returning (flux_i, flux_j, coherent) per chunk
    if on_sky:
        t_night = (p.start - w.night_t0).to_value("s")
        lat = np.deg2rad(inst.site.latitude_deg)
        h0 = hour_angle_rad(p.start, tg.ra_deg, inst.site.longitude_deg)
        h0_ft = hour_angle_rad(p.start, ft_pos[0], inst.site.longitude_deg)
        dec, dec_ft = np.deg2rad(tg.dec_deg), np.deg2rad(ft_pos[1])
        rho = injection(rng, n_t, dt, sc.injection)
        r, events = residuals(rng, n_t, dt, sc.tracking, inst.fringe_tracker.wave_min_m / 2
                              + inst.fringe_tracker.wave_max_m / 2)
        if e.kind == "sky":
            events = []
            r[:] = 0.0
        tm = np.arange(0.0, duration, sc.metrology["sample_period_s"])
        h_tm = h0 + SIDEREAL_RATE * tm
        w_sc = uvw_from_enu(inst.station_enu_m, h_tm, dec, lat)[..., 2]
        w_ft = uvw_from_enu(inst.station_enu_m, h0_ft + SIDEREAL_RATE * tm, dec_ft, lat)[..., 2]
        path = (-(w_sc - w_ft) + w.drift(t_night + tm) + w.metro_zero
                + sc.metrology["noise_nm"] * 1e-9 * rng.standard_normal(w_sc.shape))
        metrology = (tm, path)
        drift_f = w.drift(t_night + t_mid)                                    # (frame, 4)
        uvw_f = uvw_from_enu(inst.baseline_enu_m, h0 + SIDEREAL_RATE * t_mid, dec, lat)
        uvw_ft = uvw_from_enu(inst.baseline_enu_m, h0_ft + SIDEREAL_RATE * duration / 2,
                              dec_ft, lat)[0]
        phot = sc.photometry
        if e.kind == "sky":
            star = np.zeros_like(wave)
            ft_star = np.zeros_like(ftwave)
            comps = []
        else:
            star = star_photon_density(tg.kmag, wave, area_m2=w.area, throughput=phot["throughput"])
            ft_star = star_photon_density(tg.ft_kmag, ftwave, area_m2=w.area,
                                          throughput=phot["ft_throughput"])
            comps = field_components(tg)
        bg, ftbg = w.background(wave), w.background(ftwave)
        flux_rel = coupled_sky(comps, wave, 0.0, 0.0, w.fibre_fwhm)[0] if comps else 0.0
        # FT star: a point (or disk) at the FT fibre centre
        ft_comps = [] if e.kind == "sky" else [Component(1.0, 0.0, 0.0)]
        ft_flux_rel, ft_coh_rel = (coupled_sky(ft_comps, ftwave, uvw_ft[ft.baseline, 0][:, None, None],
                                               uvw_ft[ft.baseline, 1][:, None, None], w.fibre_fwhm)
                                   if ft_comps else (0.0, 0.0))
        i_, j_ = pair[:, 0], pair[:, 1]
        gain_frames = []
        bl = np.array(inst.combiner.baselines)
        # per fringe-tracker frame: mean injection, mean and variance of each baseline's
        # residual over the N_SUB_T samples inside the frame (Gaussian contrast loss)
        rho_ms = rho.reshape(n_ft, N_SUB_T, 4).mean(1)
        drs = (r[:, bl[:, 1]] - r[:, bl[:, 0]]).reshape(n_ft, N_SUB_T, 6)
        dr_ms, dv_ms = drs.mean(1), drs.var(1)
        ftbl = ft.baseline

        def sci_light(f0, f1):
            nf = f1 - f0
            rho_f = np.empty((nf, 4))
            gamma = np.empty((nf, 6, COARSE_WAVE.size), complex)
            for k, f in enumerate(range(f0, f1)):
                a = int(round(t_start[f] / period))
                b = int(round((t_start[f] + e.dit) / period))
                rh = rho_ms[a:b]
                rho_f[k] = rh.mean(0)
                amp = np.sqrt(rh[:, bl[:, 0]] * rh[:, bl[:, 1]])                # (ms, 6)
                ph = np.exp(-2j * np.pi * dr_ms[a:b, :, None] / COARSE_WAVE
                            - 2 * np.pi ** 2 * dv_ms[a:b, :, None] / COARSE_WAVE ** 2)
                gamma[k] = (amp[:, :, None] * ph).mean(0)
            g = _interp_baseline(gamma, COARSE_WAVE, wave, ch.baseline)
            u = uvw_f[f0:f1][:, ch.baseline, 0][:, :, None, None]
            v = uvw_f[f0:f1][:, ch.baseline, 1][:, :, None, None]
            coh_rel = coupled_sky(comps, wave, u, v, w.fibre_fwhm)[1] if comps else 0.0
            dd = (drift_f[f0:f1][:, pair[:, 1]] - drift_f[f0:f1][:, pair[:, 0]])[:, :, None, None]
            fi = (rho_f[:, i_][:, :, None, None] * star * flux_rel + bg) * e.dit
            fj = (rho_f[:, j_][:, :, None, None] * star * flux_rel + bg) * e.dit
            coh = g * star * coh_rel * np.exp(-2j * np.pi * dd / wave) * e.dit
            amp = np.abs(gamma[:, :, np.argmin(np.abs(COARSE_WAVE - 2.2e-6))])
            gain_frames.append(amp / np.maximum(
                np.sqrt(rho_f[:, bl[:, 0]] * rho_f[:, bl[:, 1]]), 1e-12))
            return fi, fj, coh

        # fringe-tracker expected counts: the incoherent part is linear in the injection,
        # so it is summed over each pixel's bandpass once; only the fringe term is
        # evaluated per frame on the bandpass samples (float32)
        ti, tj = ft.t_fine[:, 0], ft.t_fine[:, 1]
        src = ft_star * ft_flux_rel * period
        a_i = (ft.fine_weight * ti * src).sum(-1)                                # (trace, pix)
        a_j = (ft.fine_weight * tj * src).sum(-1)
        a_bg = (ft.fine_weight * (ti + tj) * ftbg * period).sum(-1)
        kern = (ft.fine_weight * 2 * np.sqrt(ti * tj) * ft.c_fine * np.abs(ft_coh_rel)
                * ft_star * period).astype(np.float32)                          # (trace, pix, sub)
        offs = (ft.theta_fine + (np.angle(ft_coh_rel) if ft_comps else 0.0)).astype(np.float32)
        sigma_ft = (1.0 / ftwave).astype(np.float32)
        g2 = (-2 * np.pi ** 2 * sigma_ft ** 2).astype(np.float32)

        def ft_expected(n0, n1):
            rh = rho_ms[n0:n1]
            ri, rj = rh[:, ftpair[:, 0]], rh[:, ftpair[:, 1]]                    # (n, trace)
            mean = dr_ms[n0:n1][:, ftbl].astype(np.float32)[:, :, None, None]
            var = dv_ms[n0:n1][:, ftbl].astype(np.float32)[:, :, None, None]
            fringe = (kern * np.exp(var * g2)
                      * np.cos(np.float32(-2 * np.pi) * mean * sigma_ft + offs)).sum(-1)
            return (ri[:, :, None] * a_i + rj[:, :, None] * a_j + a_bg
                    + np.sqrt(ri * rj)[:, :, None] * fringe)

        truth["hour_angle_start_rad"] = float(h0)
        truth["uvw_mid_m"] = uvw_from_enu(inst.baseline_enu_m, h0 + SIDEREAL_RATE * duration / 2,
                                          dec, lat)[0].tolist()
        truth["ft_events"] = events
        truth["mean_injection"] = rho.mean(0).tolist()
    else:
        lit = np.zeros(4)
        if e.kind in ("flat", "lamp-scan"):
            lit[:] = w.lamp_beam
        elif e.kind == "lamp-beam":
            lit[e.lamp_beam - 1] = w.lamp_beam[e.lamp_beam - 1]
        if e.kind == "lamp-scan":
            step = sc.calibration[e.setup]["scan_step_um"] * 1e-6
            rate = step / e.dit
            tm = np.arange(0.0, duration, sc.metrology["sample_period_s"])
            path = (SCAN_RATIOS * rate * (tm[:, None] - duration / 2)
                    + sc.metrology["noise_nm"] * 1e-9 * rng.standard_normal((tm.size, 4)))
            metrology = (tm, path)
            truth["scan"] = {"rate_m_per_s": rate, "ratios": SCAN_RATIOS.tolist(),
                             "t_mid_s": duration / 2, "fastest_opd_step_m": step,
                             "opd_range_fastest_m": [-rate * duration / 2, rate * duration / 2]}
        lamp_sc, lamp_ft = w.lamp(wave), w.lamp(ftwave, ft=True)

        def lamp_light(times, span, lam, spec, prs):
            li, lj = lit[prs[:, 0]][:, None, None], lit[prs[:, 1]][:, None, None]
            fi = (li * spec)[None] * span
            fj = (lj * spec)[None] * span
            if e.kind != "lamp-scan":
                return fi, fj, np.zeros(1)
            speed = (SCAN_RATIOS[prs[:, 1]] - SCAN_RATIOS[prs[:, 0]]) * rate     # (trace,)
            opd = speed[None, :, None, None] * (times[:, None, None, None] - duration / 2)
            smear = np.sinc(speed[None, :, None, None] * span / lam)
            coh = np.sqrt(fi * fj) * np.exp(-2j * np.pi * opd / lam) * smear
            return fi, fj, coh

        def sci_light(f0, f1):
            return lamp_light(t_mid[f0:f1], e.dit, wave, lamp_sc, pair)

        def ft_expected(n0, n1):
            fi, fj, coh = lamp_light(ft_time[n0:n1] - period / 2, period, ftwave, lamp_ft, ftpair)
            return detected(ft, fi, fj, coh)

        if e.kind == "dark":
            def sci_light(f0, f1):
                z = np.zeros((1, 1, 1, 1))
                return z, z, z

            def ft_expected(n0, n1):
                return np.zeros((1,) + ft.eff_wave.shape)

    # ---- science cube, chunk by chunk
    n_y = inst.detectors["science"].n_y
    window = (slice(0, n_y), slice(0, ch.n_pix))
    cosmics = []

    def chunks():
        for f0 in range(0, e.nframe, chunk):
            f1 = min(e.nframe, f0 + chunk)
            fi, fj, coh = sci_light(f0, f1)
            counts = detected(ch, fi, fj, coh)                                  # (f, trace, x)
            counts = np.broadcast_to(counts, (f1 - f0,) + counts.shape[1:])
            img = np.einsum("ftx,tyx->fyx", counts, prof)
            raw, hits = read_out(w.sci_det, img, e.dit, rng, window=window)
            cosmics.extend([[h[0] + f0, h[1], h[2]] for h in hits])
            yield raw

    # ---- fringe-tracker frames
    ft_counts = np.empty((n_ft, inst.combiner.n_output, inst.fringe_tracker.n_wave), np.uint16)
    step = 2000
    for n0 in range(0, n_ft, step):
        n1 = min(n_ft, n0 + step)
        counts = ft_expected(n0, n1)
        counts = np.broadcast_to(counts, (n1 - n0,) + counts.shape[1:])
        ft_counts[n0:n1] = read_out(w.ft_det, counts, period, rng)[0]

    cards = _cards(w, p, tg, ft_pos, rate, [])
    write_exposure(night / p.filename, cards, (e.nframe, n_y, ch.n_pix), chunks(),
                   (t_start, np.full(e.nframe, e.dit)), ft_time, ft_counts, metrology)
    truth["cosmic_hits"] = cosmics
    if on_sky and e.kind != "sky":
        truth.update(_target_truth(w, tg, t_start, e.dit, truth["ft_events"]))
        truth["frame_coherence_2p2um"] = np.concatenate(gain_frames).round(5).tolist()
    return truth


def _target_truth(w, tg, t_start, dit, events):
    out = {"object": tg.name, "primary_offset_mas": list(tg.primary_offset_mas),
           "companion_dra_mas": tg.companion_mas[0] if tg.companion_mas else None,
           "companion_ddec_mas": tg.companion_mas[1] if tg.companion_mas else None,
           "flux_ratio": tg.flux_ratio, "diameter_mas": tg.diameter_mas,
           "kmag": tg.kmag, "ft_object": tg.ft_name, "ft_kmag": tg.ft_kmag,
           "ft_offset_arcsec": list(tg.ft_offset_arcsec)}
    comps = field_components(tg)
    out["coupling_2p2um"] = [float(fibre_coupling(c.x, c.y, 2.2e-6, w.fibre_fwhm)) for c in comps]
    rejected = []
    for f, t0 in enumerate(t_start):
        if any(ev["t_start"] < t0 + dit and ev["t_end"] > t0 for ev in events):
            rejected.append(f)
    out["rejected_frames"] = rejected
    return out


def _instrument_truth(w: _World) -> dict:
    out = {"channels": {}}
    for (setup, polmode), ch in list(w.channels.items()) + [(("ft", ""), w.ft)]:
        d = {"n_pol": ch.n_pol, "trace_output": ch.output.tolist(), "trace_pol": ch.pol.tolist(),
             "wave_pixel_m": ch.eff_wave.tolist(), "bandwidth_pixel_m": ch.bandwidth.tolist(),
             "lsf_fwhm_px": ch.lsf_fwhm_px.tolist(), "dispersion": ch.dispersion,
             "combiner_laws": [law.to_json() for law in ch.laws]}
        d.update({k: v.tolist() for k, v in ch.pixel_truth().items()})
        if ch.trace_y is not None:
            d["trace_y_px"] = ch.trace_y.round(4).tolist()
            d["trace_sigma_px"] = ch.trace_sigma.round(4).tolist()
        out["channels"][ch.label] = d
    for name, det in (("science", w.sci_det), ("ft", w.ft_det)):
        out.setdefault("detectors", {})[name] = {
            "gain_e_per_adu": det.gain, "read_noise_e": det.read_noise,
            "saturation_adu": det.saturation, "bias_mean_adu": float(det.bias.mean()),
            "hot_pixels": np.argwhere(det.hot).tolist(), "dead_pixels": np.argwhere(det.dead).tolist(),
            "hot_dark_e_per_s": det.dark[det.hot].round(3).tolist(),
            "pixel_response": det.response.round(5).tolist()}
    out["lamp_beam_factor"] = w.lamp_beam.tolist()
    out["metrology_zero_m"] = w.metro_zero.tolist()
    out["metrology_drift"] = {"form": "amp_m * sin(2 pi t / period_s + phase_rad), t in s "
                                      "since start_utc", "amp_m": w.drift_amp.tolist(),
                              "period_s": w.drift_period.tolist(),
                              "phase_rad": w.drift_phase.tolist()}
    return out


def simulate_night(night_dir, *, scenario: str | os.PathLike = "tiny", seed: int = 0) -> Path:
    """Write every raw FITS file of a simulated night and ``truth.json`` into ``night_dir``.

    Parameters
    ----------
    night_dir : str or os.PathLike, created if needed
    scenario : a name in ``calib/scenarios/`` (without ``.toml``) or a path to a TOML file
    seed : int, the whole night is a deterministic function of (scenario, seed)

    Returns
    -------
    pathlib.Path of ``night_dir``
    """
    sc = load_scenario(scenario)
    inst = load_instrument()
    night = Path(night_dir)
    night.mkdir(parents=True, exist_ok=True)
    plan = plan_night(sc, inst)
    world = _World(sc, inst, seed, plan)
    files = {}
    for p in plan:
        files[p.filename] = _simulate_exposure(world, p, night, seed)
    truth = {"schema": "twinfield-truth/1", "scenario": sc.name, "seed": seed,
             "start_utc": sc.start_utc,
             "photometry": {"vega_k_flambda_w_m2_um": 4.5e-10, "note": "zero point from memory; "
                            "throughput an assumption", **sc.photometry},
             "instrument": _instrument_truth(world), "files": files}
    tmp = night / "truth.json.part"
    tmp.write_text(json.dumps(truth, indent=1))
    os.replace(tmp, night / "truth.json")
    return night
