# SPDX-License-Identifier: BSD-3-Clause
"""Light reaching the combiner during one exposure, per kind.

Each model gives, per chunk of science frames, the photon densities of the two
telescopes of every trace's pair and the coherent flux on the bandpass samples
(``science(f0, f1)`` -> (flux_i, flux_j, coherent), broadcastable to
(frame, trace, pix, sub), photons per metre of wavelength per frame), and per chunk of
fringe-tracker frames the expected photo-electrons (``ft(n0, n1)`` -> (frame, output,
ft_wave)). On-sky and lamp-scan models also produce the METROLOGY series.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..geometry import hour_angle_rad, uvw_from_enu
from .combine import detected
from .sky import Component, coupled_sky, field_components, star_photon_density
from .turbulence import injection, residuals
from .world import COARSE_WAVE, N_SUB_T, SCAN_RATIOS, SIDEREAL_RATE, World

__all__ = ["Timing", "timing", "OnSkyLight", "LampLight", "DarkLight"]


@dataclass(frozen=True)
class Timing:
    """Clocks of one exposure, seconds since DATE-OBS."""
    dit: float
    nframe: int
    duration: float
    t_start: np.ndarray     # (frame,) science frame starts
    t_mid: np.ndarray       # (frame,)
    period: float           # fringe-tracker frame period
    n_ft: int
    ft_time: np.ndarray     # (ft_frame,) end of each fringe-tracker frame
    dt: float               # sampling of the time series, period / N_SUB_T


def timing(e, period: float, ft_duration_max: float | None) -> Timing:
    duration = e.nframe * e.dit
    ft_duration = duration if ft_duration_max is None else min(duration, ft_duration_max)
    n_ft = max(1, int(round(ft_duration / period)))
    t_start = np.arange(e.nframe) * e.dit
    return Timing(e.dit, e.nframe, duration, t_start, t_start + e.dit / 2, period, n_ft,
                  (np.arange(n_ft) + 1) * period, period / N_SUB_T)


def _interp_baseline(gamma, coarse, wave, baseline):
    """Frame-averaged phasors gamma (frame, baseline, coarse) -> (frame, trace, pix, sub)."""
    out = np.empty((gamma.shape[0],) + wave.shape, complex)
    for f in range(gamma.shape[0]):
        for b in np.unique(baseline):
            sel = baseline == b
            out[f, sel] = (np.interp(wave[sel], coarse, gamma[f, b].real)
                           + 1j * np.interp(wave[sel], coarse, gamma[f, b].imag))
    return out


class OnSkyLight:
    """Sky, calibrator or science exposure: field, fringe-tracker star, injection,
    fringe-tracking residuals, dual-field path and metrology (DEVELOPERS.md phase model)."""

    def __init__(self, w: World, ch, kind: str, start, tg, ft_pos, tim: Timing, rng):
        inst, sc, ft = w.inst, w.sc, w.ft
        self.w, self.ch, self.tim = w, ch, tim
        self.rate = 0.0
        t_night = (start - w.night_t0).to_value("s")
        lat = np.deg2rad(inst.site.latitude_deg)
        h0 = hour_angle_rad(start, tg.ra_deg, inst.site.longitude_deg)
        h0_ft = hour_angle_rad(start, ft_pos[0], inst.site.longitude_deg)
        dec, dec_ft = np.deg2rad(tg.dec_deg), np.deg2rad(ft_pos[1])
        n_t = tim.n_ft * N_SUB_T
        rho = injection(rng, n_t, tim.dt, sc.injection)
        r, events = residuals(rng, n_t, tim.dt, sc.tracking, inst.fringe_tracker.wave_min_m / 2
                              + inst.fringe_tracker.wave_max_m / 2)
        if kind == "sky":
            events = []
            r[:] = 0.0
        tm = np.arange(0.0, tim.duration, sc.metrology["sample_period_s"])
        w_sc = uvw_from_enu(inst.station_enu_m, h0 + SIDEREAL_RATE * tm, dec, lat)[..., 2]
        w_ft = uvw_from_enu(inst.station_enu_m, h0_ft + SIDEREAL_RATE * tm, dec_ft, lat)[..., 2]
        path = (-(w_sc - w_ft) + w.drift(t_night + tm) + w.metro_zero
                + sc.metrology["noise_nm"] * 1e-9 * rng.standard_normal(w_sc.shape))
        self.metrology = (tm, path)
        self.drift_f = w.drift(t_night + tim.t_mid)                               # (frame, 4)
        self.uvw_f = uvw_from_enu(inst.baseline_enu_m, h0 + SIDEREAL_RATE * tim.t_mid, dec, lat)
        uvw_ft = uvw_from_enu(inst.baseline_enu_m, h0_ft + SIDEREAL_RATE * tim.duration / 2,
                              dec_ft, lat)[0]
        wave, ftwave = ch.fine_wave, ft.fine_wave
        phot = sc.photometry
        if kind == "sky":
            self.star, ft_star, self.comps = np.zeros_like(wave), np.zeros_like(ftwave), []
        else:
            self.star = star_photon_density(tg.kmag, wave, area_m2=w.area,
                                            throughput=phot["throughput"])
            ft_star = star_photon_density(tg.ft_kmag, ftwave, area_m2=w.area,
                                          throughput=phot["ft_throughput"])
            self.comps = field_components(tg)
        self.bg, ftbg = w.background(wave), w.background(ftwave)
        self.flux_rel = (coupled_sky(self.comps, wave, 0.0, 0.0, w.fibre_fwhm)[0]
                         if self.comps else 0.0)
        # the FT star: a point at the FT fibre centre
        ft_comps = [] if kind == "sky" else [Component(1.0, 0.0, 0.0)]
        ft_flux_rel, ft_coh_rel = (
            coupled_sky(ft_comps, ftwave, uvw_ft[ft.baseline, 0][:, None, None],
                        uvw_ft[ft.baseline, 1][:, None, None], w.fibre_fwhm)
            if ft_comps else (0.0, 0.0))
        self.bl = np.array(inst.combiner.baselines)
        # per fringe-tracker frame: mean injection, mean and variance of each baseline's
        # residual over the N_SUB_T samples inside the frame (Gaussian contrast loss)
        self.rho_ms = rho.reshape(tim.n_ft, N_SUB_T, 4).mean(1)
        drs = (r[:, self.bl[:, 1]] - r[:, self.bl[:, 0]]).reshape(tim.n_ft, N_SUB_T, 6)
        self.dr_ms, self.dv_ms = drs.mean(1), drs.var(1)
        self.coherence = []
        # fringe-tracker expected counts: the incoherent part is linear in the injection,
        # so it is summed over each pixel's bandpass once; only the fringe term is
        # evaluated per frame on the bandpass samples (float32)
        ti, tj = ft.t_fine[:, 0], ft.t_fine[:, 1]
        src = ft_star * ft_flux_rel * tim.period
        self.a_i = (ft.fine_weight * ti * src).sum(-1)                           # (trace, pix)
        self.a_j = (ft.fine_weight * tj * src).sum(-1)
        self.a_bg = (ft.fine_weight * (ti + tj) * ftbg * tim.period).sum(-1)
        self.kern = (ft.fine_weight * 2 * np.sqrt(ti * tj) * ft.c_fine * np.abs(ft_coh_rel)
                     * ft_star * tim.period).astype(np.float32)                 # (trace, pix, sub)
        self.offs = (ft.theta_fine + (np.angle(ft_coh_rel) if ft_comps else 0.0)
                     ).astype(np.float32)
        self.sigma_ft = (1.0 / ftwave).astype(np.float32)
        self.g2 = (-2 * np.pi ** 2 * self.sigma_ft ** 2).astype(np.float32)
        self.truth = {
            "hour_angle_start_rad": float(h0),
            "uvw_mid_m": uvw_from_enu(inst.baseline_enu_m, h0 + SIDEREAL_RATE * tim.duration / 2,
                                      dec, lat)[0].tolist(),
            "ft_events": events, "mean_injection": rho.mean(0).tolist()}

    def science(self, f0, f1):
        tim, ch, bl, w = self.tim, self.ch, self.bl, self.w
        nf = f1 - f0
        rho_f = np.empty((nf, 4))
        gamma = np.empty((nf, 6, COARSE_WAVE.size), complex)
        for k, f in enumerate(range(f0, f1)):
            a = int(round(tim.t_start[f] / tim.period))
            b = int(round((tim.t_start[f] + tim.dit) / tim.period))
            rh = self.rho_ms[a:b]
            rho_f[k] = rh.mean(0)
            amp = np.sqrt(rh[:, bl[:, 0]] * rh[:, bl[:, 1]])                    # (ms, 6)
            ph = np.exp(-2j * np.pi * self.dr_ms[a:b, :, None] / COARSE_WAVE
                        - 2 * np.pi ** 2 * self.dv_ms[a:b, :, None] / COARSE_WAVE ** 2)
            gamma[k] = (amp[:, :, None] * ph).mean(0)
        wave, pair = ch.fine_wave, ch.pair
        g = _interp_baseline(gamma, COARSE_WAVE, wave, ch.baseline)
        u = self.uvw_f[f0:f1][:, ch.baseline, 0][:, :, None, None]
        v = self.uvw_f[f0:f1][:, ch.baseline, 1][:, :, None, None]
        coh_rel = coupled_sky(self.comps, wave, u, v, w.fibre_fwhm)[1] if self.comps else 0.0
        dd = (self.drift_f[f0:f1][:, pair[:, 1]]
              - self.drift_f[f0:f1][:, pair[:, 0]])[:, :, None, None]
        src = self.star * self.flux_rel
        fi = (rho_f[:, pair[:, 0]][:, :, None, None] * src + self.bg) * tim.dit
        fj = (rho_f[:, pair[:, 1]][:, :, None, None] * src + self.bg) * tim.dit
        coh = g * self.star * coh_rel * np.exp(-2j * np.pi * dd / wave) * tim.dit
        amp = np.abs(gamma[:, :, np.argmin(np.abs(COARSE_WAVE - 2.2e-6))])
        self.coherence.append(amp / np.maximum(
            np.sqrt(rho_f[:, bl[:, 0]] * rho_f[:, bl[:, 1]]), 1e-12))
        return fi, fj, coh

    def ft(self, n0, n1):
        ftpair, ftbl = self.w.ft.pair, self.w.ft.baseline
        rh = self.rho_ms[n0:n1]
        ri, rj = rh[:, ftpair[:, 0]], rh[:, ftpair[:, 1]]                        # (n, trace)
        mean = self.dr_ms[n0:n1][:, ftbl].astype(np.float32)[:, :, None, None]
        var = self.dv_ms[n0:n1][:, ftbl].astype(np.float32)[:, :, None, None]
        fringe = (self.kern * np.exp(var * self.g2)
                  * np.cos(np.float32(-2 * np.pi) * mean * self.sigma_ft + self.offs)).sum(-1)
        return (ri[:, :, None] * self.a_i + rj[:, :, None] * self.a_j + self.a_bg
                + np.sqrt(ri * rj)[:, :, None] * fringe)


class LampLight:
    """Flat (all beams, no fringes), lamp-beam (one beam) or lamp-scan (all beams,
    coherent, scanning-stage paths PATH_i = ratio_i SCANRATE (t - t_mid))."""

    def __init__(self, w: World, ch, kind: str, lamp_beam: int, scan_step_m: float,
                 tim: Timing, rng):
        self.w, self.ch, self.tim, self.kind = w, ch, tim, kind
        lit = np.zeros(4)
        if kind in ("flat", "lamp-scan"):
            lit[:] = w.lamp_beam
        elif kind == "lamp-beam":
            lit[lamp_beam - 1] = w.lamp_beam[lamp_beam - 1]
        self.lit = lit
        self.rate = 0.0
        self.metrology = None
        self.truth = {}
        if kind == "lamp-scan":
            self.rate = scan_step_m / tim.dit
            tm = np.arange(0.0, tim.duration, w.sc.metrology["sample_period_s"])
            path = (SCAN_RATIOS * self.rate * (tm[:, None] - tim.duration / 2)
                    + w.sc.metrology["noise_nm"] * 1e-9 * rng.standard_normal((tm.size, 4)))
            self.metrology = (tm, path)
            half = self.rate * tim.duration / 2
            self.truth["scan"] = {"rate_m_per_s": self.rate, "ratios": SCAN_RATIOS.tolist(),
                                  "t_mid_s": tim.duration / 2, "fastest_opd_step_m": scan_step_m,
                                  "opd_range_fastest_m": [-half, half]}
        self.spec = w.lamp(ch.fine_wave)
        self.ft_spec = w.lamp(w.ft.fine_wave, ft=True)

    def _light(self, times, span, lam, spec, prs):
        li, lj = self.lit[prs[:, 0]][:, None, None], self.lit[prs[:, 1]][:, None, None]
        fi = (li * spec)[None] * span
        fj = (lj * spec)[None] * span
        if self.kind != "lamp-scan":
            return fi, fj, np.zeros(1)
        speed = (SCAN_RATIOS[prs[:, 1]] - SCAN_RATIOS[prs[:, 0]]) * self.rate      # (trace,)
        opd = speed[None, :, None, None] * (times[:, None, None, None] - self.tim.duration / 2)
        # the stage moves during the frame: the fringe averages to sinc(speed span / lambda)
        smear = np.sinc(speed[None, :, None, None] * span / lam)
        coh = np.sqrt(fi * fj) * np.exp(-2j * np.pi * opd / lam) * smear
        return fi, fj, coh

    def science(self, f0, f1):
        return self._light(self.tim.t_mid[f0:f1], self.tim.dit, self.ch.fine_wave, self.spec,
                           self.ch.pair)

    def ft(self, n0, n1):
        ft, tim = self.w.ft, self.tim
        fi, fj, coh = self._light(tim.ft_time[n0:n1] - tim.period / 2, tim.period, ft.fine_wave,
                                  self.ft_spec, ft.pair)
        return detected(ft, fi, fj, coh)


class PixelFlatLight:
    """Detector flat: the science detector lit directly and nearly uniformly (an internal
    lamp through a diffuser, not through the combiner), so every pixel's response is
    seen without the traces; a gentle linear gradient, ``level_e`` photo-electrons per
    pixel and frame at the centre. No light on the fringe tracker."""
    def __init__(self, w: World, level_e: float, shape: tuple):
        n_y, n_x = shape
        gy = (np.arange(n_y) + 0.5) / n_y - 0.5
        gx = (np.arange(n_x) + 0.5) / n_x - 0.5
        self.illumination = level_e * (1 + 0.04 * gy[:, None] + 0.03 * gx[None, :])
        self.shape = w.ft.eff_wave.shape
        self.metrology, self.rate = None, 0.0
        self.truth = {"pixel_flat_e": float(level_e),
                      "illumination": "level_e * (1 + 0.04 (y/n_y - 1/2) + 0.03 (x/n_x - 1/2))"
                                      ", pixel centres"}

    def image(self, f0, f1):
        return np.broadcast_to(self.illumination, (f1 - f0,) + self.illumination.shape)

    def ft(self, n0, n1):
        return np.zeros((1,) + self.shape)


class DarkLight:
    """No light on either channel."""
    def __init__(self, w: World):
        self.shape = w.ft.eff_wave.shape
        self.metrology, self.rate, self.truth = None, 0.0, {}

    def science(self, f0, f1):
        z = np.zeros((1, 1, 1, 1))
        return z, z, z

    def ft(self, n0, n1):
        return np.zeros((1,) + self.shape)
