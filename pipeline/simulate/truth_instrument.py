# SPDX-License-Identifier: BSD-3-Clause
"""The true (imperfect) instrument of one simulated night, drawn from the nominal model.

Per output k (and polarisation) of a combiner, smooth functions of wavelength:
transmissions t_ki for the two telescopes of the output's pair, phase shift
theta_k and instrumental contrast c_k. Per science set-up: each trace's centre
y_k(x), cross-profile width sigma_k(x), dispersion law lambda_k(x) and line-spread
FWHM. Each detector pixel of a channel integrates the signal over its bandpass,
sampled on ``n_sub`` wavelengths inside it (Gaussian line-spread, weights in metres
of bandpass), which is how bandwidth smearing enters the forward model.

Axes: ``trace`` = output * n_pol + pol (science) or output (fringe tracker);
``pix`` = detector column x (science) or spectral pixel (fringe tracker);
``sub`` = samples inside a pixel's bandpass.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..instrument import Instrument

__all__ = ["Channel", "draw_combiner", "science_channel", "ft_channel", "WAVE_REF_M"]

WAVE_REF_M = 2.2e-6     # reference wavelength of the chromatic polynomials
WAVE_SCALE_M = 0.2e-6   # xi = (lambda - WAVE_REF_M) / WAVE_SCALE_M


@dataclass(frozen=True)
class CombinerLaw:
    """Smooth chromatic laws of one combiner (one polarisation).

    t_k,(i|j)(lambda) = t_nom * amp[k, a] * (1 + tc[k, a, 0] xi + tc[k, a, 1] xi^2)
    theta_k(lambda)   = theta_nom[k] + ph[k, 0] + ph[k, 1] xi + ph[k, 2] xi^2   (rad)
    c_k(lambda)       = clip(c0[k] + c1[k] xi, cmin, cmax)
    with xi = (lambda - 2.2 um) / 0.2 um; a = 0 for telescope i, 1 for j of the pair.
    """
    t_nom: float
    amp: np.ndarray          # (output, 2)
    tc: np.ndarray           # (output, 2, 2)
    theta_nom: np.ndarray    # (output,)
    ph: np.ndarray           # (output, 3)
    c0: np.ndarray           # (output,)
    c1: np.ndarray           # (output,)
    cmin: float
    cmax: float

    def evaluate(self, wave_m, outputs):
        """Transmission (n, 2, ...), phase shift (n, ...) rad, contrast (n, ...) at
        wavelengths ``wave_m`` of shape (n, ...) for combiner outputs ``outputs`` (n,)."""
        xi = (np.asarray(wave_m) - WAVE_REF_M) / WAVE_SCALE_M
        o = np.asarray(outputs)
        ex = (slice(None),) + (None,) * (xi.ndim - 1)
        t = np.stack([self.t_nom * self.amp[o, a][ex]
                      * (1 + self.tc[o, a, 0][ex] * xi + self.tc[o, a, 1][ex] * xi ** 2)
                      for a in (0, 1)], axis=1)
        theta = (self.theta_nom[o][ex] + self.ph[o, 0][ex] + self.ph[o, 1][ex] * xi
                 + self.ph[o, 2][ex] * xi ** 2)
        c = np.clip(self.c0[o][ex] + self.c1[o][ex] * xi, self.cmin, self.cmax)
        return t, theta, c

    def to_json(self):
        return {"t_nominal": self.t_nom, "amp": self.amp.tolist(), "t_chromatic": self.tc.tolist(),
                "theta_nominal_rad": self.theta_nom.tolist(), "theta_poly_rad": self.ph.tolist(),
                "contrast_c0": self.c0.tolist(), "contrast_c1": self.c1.tolist(),
                "contrast_clip": [self.cmin, self.cmax],
                "xi": "(lambda_m - 2.2e-6) / 0.2e-6"}


def draw_combiner(instrument: Instrument, errors: dict, rng: np.random.Generator,
                  *, t_scale: float = 1.0) -> CombinerLaw:
    """Draw a true combiner around the nominal one (knobs in the scenario's ``[errors]``)."""
    comb = instrument.combiner
    n = comb.n_output
    amp = np.clip(1 + errors["transmission_scatter"] * rng.uniform(-1, 1, (n, 2)), 0.5, 1.5)
    tc = errors["transmission_chromatic"] * rng.uniform(-1, 1, (n, 2, 2))
    tc[..., 1] *= 0.5
    emax = np.deg2rad(errors["phase_error_deg"])
    ph = np.stack([rng.uniform(-0.6, 0.6, n), rng.uniform(-0.25, 0.25, n),
                   rng.uniform(-0.15, 0.15, n)], axis=1) * emax
    cmin, cmax = errors["contrast_range"]
    c0 = rng.uniform(cmin + 0.03, cmax - 0.02, n)
    c1 = rng.uniform(-0.02, 0.02, n)
    return CombinerLaw(comb.nominal_transmission * t_scale, amp, tc,
                       comb.output_nominal_phase_rad.copy(), ph, c0, c1, float(cmin), float(cmax))


@dataclass(frozen=True)
class Channel:
    """A channel's true response sampled for the forward model (see module doc for axes)."""
    label: str
    n_pol: int
    output: np.ndarray        # (trace,) combiner output of each trace
    pol: np.ndarray           # (trace,)
    pair: np.ndarray          # (trace, 2) telescopes (i, j), 0-based
    baseline: np.ndarray      # (trace,)
    fine_wave: np.ndarray     # (trace, pix, sub) m
    fine_weight: np.ndarray   # (trace, pix, sub) m of bandpass (sums to the pixel's width)
    t_fine: np.ndarray        # (trace, 2, pix, sub)
    theta_fine: np.ndarray    # (trace, pix, sub) rad
    c_fine: np.ndarray        # (trace, pix, sub)
    eff_wave: np.ndarray      # (trace, pix) m, flux-weighted mean wavelength of the bandpass
    bandwidth: np.ndarray     # (trace, pix) m, FWHM of the bandpass
    lsf_fwhm_px: np.ndarray   # (trace,)
    laws: tuple               # CombinerLaw per pol
    trace_y: np.ndarray | None = None      # (trace, x) px
    trace_sigma: np.ndarray | None = None  # (trace, x) px
    dispersion: dict | None = None

    @property
    def n_trace(self) -> int:
        return self.output.size

    @property
    def n_pix(self) -> int:
        return self.fine_wave.shape[1]

    def pixel_truth(self) -> dict:
        """Per-pixel truth at each pixel's effective wavelength, in the product axes:
        transmission (pol, output, telescope, pix), phase_shift_rad and contrast
        (pol, output, pix)."""
        n_out = self.n_trace // self.n_pol
        trans = np.zeros((self.n_pol, n_out, 4, self.n_pix))
        theta = np.zeros((self.n_pol, n_out, self.n_pix))
        contrast = np.zeros((self.n_pol, n_out, self.n_pix))
        for p in range(self.n_pol):
            sel = self.pol == p
            t, th, c = self.laws[p].evaluate(self.eff_wave[sel], self.output[sel])
            for a in (0, 1):
                trans[p, self.output[sel], self.pair[sel, a]] = t[:, a]
            theta[p, self.output[sel]] = th
            contrast[p, self.output[sel]] = c
        return {"transmission": trans, "phase_shift_rad": theta, "contrast": contrast}


def _bandpass(centre_px, fwhm_px, law, n_sub):
    """Sample each pixel's Gaussian bandpass: offsets in pixels, weights, wavelengths.

    centre_px : (trace, pix); fwhm_px : (trace,); law(trace_index, x_px) -> wavelength.
    Returns fine_wave (trace, pix, sub), weight in metres (trace, pix, sub),
    eff_wave (trace, pix), bandwidth FWHM (trace, pix) m.
    """
    u = np.linspace(-1.75, 1.75, n_sub)                                 # in FWHM units
    off = u[None, None, :] * fwhm_px[:, None, None]                      # (trace, 1, sub)
    xs = centre_px[:, :, None] + off                                     # (trace, pix, sub)
    wave = law(xs)
    g = np.exp(-4 * np.log(2) * u ** 2)
    g = g / g.sum()
    dldx = np.abs(np.gradient(law(centre_px), axis=1))                   # (trace, pix) m/px
    weight = g[None, None, :] * dldx[:, :, None]
    eff = (wave * g).sum(-1)
    return wave, weight, eff, fwhm_px[:, None] * dldx


def science_channel(instrument: Instrument, setup_name: str, polmode: str, laws: tuple,
                    errors: dict, rng: np.random.Generator, n_sub: int) -> Channel:
    """The true science channel of one set-up and polarisation mode."""
    s = instrument.setup(setup_name)
    comb = instrument.combiner
    n_pol = s.n_pol(polmode)
    n_out = comb.n_output
    n_tr = n_out * n_pol
    output = np.repeat(np.arange(n_out), n_pol)
    pol = np.tile(np.arange(n_pol), n_out)
    x = np.arange(s.n_x, dtype=float)
    xr = (x - s.x_centre_px) / s.n_x                                     # -0.5 .. 0.5
    y0 = np.array([s.nominal_trace_y(o, p, polmode) for o, p in zip(output, pol)])
    dy = errors["trace_offset_px"] * rng.standard_normal(n_tr)
    tilt = errors["trace_tilt_px"] * rng.uniform(-1, 1, n_tr)
    curv = errors["trace_curvature_px"] * rng.uniform(-1, 1, n_tr)
    trace_y = (y0 + dy)[:, None] + tilt[:, None] * xr + curv[:, None] * (xr ** 2 - 1 / 12)
    sig0 = s.trace_sigma_px * (1 + errors["trace_sigma_scatter"] * rng.standard_normal(n_tr))
    sig1 = 0.05 * rng.uniform(-1, 1, n_tr)
    trace_sigma = sig0[:, None] * (1 + sig1[:, None] * xr)
    shift = errors["dispersion_shift_px"] * rng.uniform(-1, 1, n_tr)
    scale = errors["dispersion_scale"] * rng.standard_normal(n_tr)
    quad = errors["dispersion_quad_px"] * rng.uniform(-1, 1, n_tr)          # px of quadratic departure at the edges
    disp = s.dispersion_m_per_px

    def law(xs):
        e = (slice(None),) + (None,) * (np.ndim(xs) - 1)
        d = xs - s.x_centre_px - shift[e]
        return (s.wave_centre_m + disp * (1 + scale[e]) * d
                + disp * quad[e] * 4 * ((xs - s.x_centre_px) / s.n_x) ** 2)

    fwhm = s.channel_fwhm_px * (1 + errors["lsf_scatter"] * rng.standard_normal(n_tr))
    wave, weight, eff, bw = _bandpass(np.broadcast_to(x, (n_tr, s.n_x)), fwhm, law, n_sub)
    t = np.empty((n_tr, 2, s.n_x, n_sub))
    theta = np.empty((n_tr, s.n_x, n_sub))
    c = np.empty((n_tr, s.n_x, n_sub))
    for p in range(n_pol):
        sel = pol == p
        t[sel], theta[sel], c[sel] = laws[p].evaluate(wave[sel], output[sel])
    dispersion = {"form": "lambda(x) = wave_centre_m + dispersion_m_per_px*(1+scale)*(x - x_centre_px"
                          " - shift_px) + dispersion_m_per_px*quad_px*4*((x - x_centre_px)/n_x)^2",
                  "wave_centre_m": s.wave_centre_m, "dispersion_m_per_px": disp,
                  "x_centre_px": s.x_centre_px, "n_x": s.n_x,
                  "shift_px": shift.tolist(), "scale": scale.tolist(), "quad_px": quad.tolist()}
    return Channel(label=f"sci-{setup_name}-{polmode}", n_pol=n_pol, output=output, pol=pol,
                   pair=comb.output_pair[output], baseline=comb.output_baseline[output],
                   fine_wave=wave, fine_weight=weight, t_fine=t, theta_fine=theta, c_fine=c,
                   eff_wave=eff, bandwidth=bw, lsf_fwhm_px=fwhm, laws=tuple(laws[:n_pol]),
                   trace_y=trace_y, trace_sigma=trace_sigma, dispersion=dispersion)


def ft_channel(instrument: Instrument, law: CombinerLaw, errors: dict,
               rng: np.random.Generator, n_sub: int) -> Channel:
    """The true fringe-tracker channel (its own combiner, ``n_wave`` pixels per output)."""
    ft = instrument.fringe_tracker
    comb = instrument.combiner
    n_out = comb.n_output
    nominal = ft.nominal_wavelength_m()
    step = (ft.wave_max_m - ft.wave_min_m) / (ft.n_wave - 1)
    shift = errors["ft_wave_shift_px"] * rng.uniform(-1, 1, n_out)

    def law_px(xs):
        e = (slice(None),) + (None,) * (np.ndim(xs) - 1)
        return ft.wave_min_m + step * (xs + shift[e])

    fwhm = ft.channel_fwhm_px * (1 + errors["lsf_scatter"] * rng.standard_normal(n_out))
    centre = np.broadcast_to(np.arange(ft.n_wave, dtype=float), (n_out, ft.n_wave))
    wave, weight, eff, bw = _bandpass(centre, fwhm, law_px, n_sub)
    output = np.arange(n_out)
    t, theta, c = law.evaluate(wave, output)
    return Channel(label="ft", n_pol=1, output=output, pol=np.zeros(n_out, int),
                   pair=comb.output_pair, baseline=comb.output_baseline, fine_wave=wave,
                   fine_weight=weight, t_fine=t, theta_fine=theta, c_fine=c, eff_wave=eff,
                   bandwidth=bw, lsf_fwhm_px=fwhm, laws=(law,),
                   dispersion={"form": "lambda(p) = wave_min_m + step_m*(p + shift_px)",
                               "wave_min_m": ft.wave_min_m, "step_m": step,
                               "shift_px": shift.tolist(), "nominal_m": nominal.tolist()})
