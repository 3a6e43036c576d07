# SPDX-License-Identifier: BSD-3-Clause
"""Lamp calibrations of one channel: flat and traces, wavelengths, combiner model.

The glue between raw exposures (``pipeline.rawio.RawExposure``), upstream
products (anything mapping dataset names to arrays, e.g. ``store.ProductView``)
and the kernels in ``pipeline.numerics`` (traces, extraction, wavelength,
combiner_model). Frames are read in chunks; at most one exposure's extracted
spectra (frame, trace, x) are held at a time.

Conventions: science traces ``output * n_pol + pol``; delay-scan OPD of the
baseline (i, j) = metrology ``PATH[j] - PATH[i]``, averaged over each frame's
exposure; fringe-tracker frames are centred half a period before their
``TIME``.
"""

from __future__ import annotations

import dataclasses
import warnings

import numpy as np

from .errors import BadInput, MissingCalibration
from .numerics import combiner_model as cm
from .numerics.extraction import (apply_fixed_weights, fixed_weight_extractor, optimal_extract,
                                  resample_to_grid)
from .numerics.traces import (combine_valid, detector_response, find_traces, pixel_response,
                              trace_profiles)
from .numerics.wavelength import (ScanFit, baseline_bandwidth, common_grid,
                                  fit_dispersion_law, fit_fringe_scan, fringe_phasor)
from .stage import Array
from .store import computed_here

__all__ = ["check_raw", "flat_products", "scan_spectra", "frame_opd", "wavecal_products",
           "wavecal_science", "wavecal_ft", "combiner_science", "combiner_ft",
           "combiner_products", "ft_scan_counts", "ft_mean_counts"]


def _where(view, default):
    return str(getattr(view, "path", default))


def check_raw(raws, *, kind, setup=None, polmode=None):
    """Raise BadInput naming the file if an exposure is not of the expected kind/set-up."""
    for r in raws:
        if kind is not None and r.kind != kind:
            raise BadInput(r.path, f"expected a {kind!r} exposure, found {r.kind!r}")
        if setup is not None and (r.setup, r.polmode) != (setup, polmode):
            raise BadInput(r.path, f"set-up {r.setup}/{r.polmode} does not match the "
                                   f"calibration being built ({setup}/{polmode})")


def _chunks(raw, frames_per_chunk):
    for block in raw.science_pixels(frames_per_chunk).blocks:
        yield np.asarray(computed_here(block), float)


def _nominal_trace_y(setup, polmode, n_out):
    n_pol = setup.n_pol(polmode)
    return np.array([setup.nominal_trace_y(o, p, polmode)
                     for o in range(n_out) for p in range(n_pol)])


# -- flat -----------------------------------------------------------------------------------

def _mean_frame(raws, dark, det, frames_per_chunk):
    """Mean dark-subtracted frame (e-), frame count and saturated-pixel map of exposures."""
    master = np.asarray(dark["master"], float)
    total, n, sat = 0.0, 0, np.zeros(master.shape, bool)
    for raw in raws:
        for pix in _chunks(raw, frames_per_chunk):
            if pix.shape[1:] != master.shape:
                raise BadInput(raw.path, f"frames {pix.shape[1:]} do not match the dark "
                                         f"{_where(dark, 'dark')} {master.shape}")
            sat |= (pix >= det.saturation_adu).any(axis=0)
            total = total + ((pix - master) * det.gain_e_per_adu).sum(axis=0)
            n += pix.shape[0]
    return total / n, n, sat


def flat_products(raws, dark, *, instrument, setup_name, polmode, frames_per_chunk=16,
                  centre_deg=2, sigma_deg=2, spectrum_deg=3, max_saturated=0.001,
                  response_range=(0.5, 1.5), pixel_flats=(), pixel_dark=None) -> dict:
    """Traces, cross-profiles, pixel response and bad-pixel mask from lamp flats.

    With detector flats (``pixel_flats``, dark-subtracted with ``pixel_dark``, default
    ``dark``) the pixel response is measured directly and the trace flat is divided by
    it first, so each trace's lamp spectrum needs no smoothing along x and its
    throughput keeps none of its pixels' response. Without them, the lamp spectrum is
    smoothed by a polynomial of degree ``spectrum_deg`` and the smooth part of a
    trace's column responses stays in its throughput (a lamp flat cannot separate them)."""
    check_raw(raws, kind="flat", setup=setup_name, polmode=polmode)
    det = instrument.detectors["science"]
    setup = instrument.setup(setup_name)
    mean, n, sat = _mean_frame(raws, dark, det, frames_per_chunk)
    valid0 = np.asarray(dark["valid"], bool) & ~sat & np.isfinite(mean)
    nominal = _nominal_trace_y(setup, polmode, instrument.combiner.n_output)
    rn = float(np.nanmedian(np.asarray(dark["read_noise"], float))) * det.gain_e_per_adu
    rows = np.arange(mean.shape[0])[:, None]
    core = (np.abs(rows - nominal[None, :]) < 3 * setup.trace_sigma_px).any(1)[:, None]
    frac = (sat & core).sum() / max(core.sum() * sat.shape[1], 1)
    if frac > max_saturated:
        raise BadInput(raws[0].path, f"{100 * frac:.2f}% of the trace pixels are saturated in "
                                     "the flat; take flats with a shorter DIT")
    det_response = None
    if pixel_flats:
        check_raw(pixel_flats, kind="pixel-flat", setup=setup_name, polmode=polmode)
        pmean, _, psat = _mean_frame(pixel_flats, pixel_dark or dark, det, frames_per_chunk)
        if psat.mean() > max_saturated:
            raise BadInput(pixel_flats[0].path, f"{100 * psat.mean():.2f}% of the pixels are "
                                                "saturated in the detector flat")
        det_response, _ = detector_response(
            np.where(np.isfinite(pmean), pmean, 0.0),
            valid=np.asarray(dark["valid"], bool) & ~psat & np.isfinite(pmean))
        lo, hi = response_range
        usable = np.isfinite(det_response) & (det_response > lo) & (det_response < hi)
        valid0 &= usable
        mean = np.where(usable, mean / np.where(usable, det_response, 1.0), 0.0)
    fit = find_traces(np.where(valid0, mean, 0.0), nominal, valid=valid0,
                      nominal_sigma=setup.trace_sigma_px, centre_deg=centre_deg,
                      sigma_deg=sigma_deg, read_noise=rn / np.sqrt(n))
    smooth = None if pixel_flats else min(spectrum_deg, setup.n_x - 2)
    response, lamp = pixel_response(np.where(valid0, mean, 0.0), fit.trace_y, fit.profile_sigma,
                                    valid=valid0, smooth_deg=smooth)
    if det_response is not None:
        response = response * np.where(np.isfinite(det_response), det_response, 1.0)
    valid = combine_valid(dark["valid"], response, flat_saturated=sat,
                          response_range=response_range) & valid0
    tr, yx = ("trace", "x"), ("y", "x")
    return {"trace_y": Array(fit.trace_y, tr, "px", "trace centre, smooth law"),
            "profile_sigma": Array(fit.profile_sigma, tr, "px",
                                   "Gaussian cross-profile width (pixel-integrated model)"),
            "pixel_response": Array(response, yx, "", "flat field; divide frames by it"),
            "valid": Array(valid, yx, "", "True = usable pixel (dark and flat masks)"),
            "lamp_spectrum": Array(lamp / raws[0].dit, tr, "e-/s", "smoothed lamp spectrum"),
            "trace_y_measured": Array(fit.centre_measured, tr, "px", "QC: per-column centre"),
            "profile_sigma_measured": Array(fit.sigma_measured, tr, "px", "QC"),
            "trace_residual_rms": Array(fit.centre_residual_rms, ("trace",), "px", "QC"),
            "centre_coeffs": Array(fit.centre_coeffs, ("trace", "coef"), "px",
                                   "polynomial in (x - x_ref) / x_scale, lowest order first"),
            "x_ref": fit.x_ref, "x_scale": fit.x_scale, "n_frame": n,
            "n_invalid": int((~valid).sum()), "setup": setup_name, "polmode": polmode,
            "response_source": ("detector flat x trace-flat profile residual" if pixel_flats else
                                "trace flat (lamp spectrum smoothed along x)")}


# -- extraction of lamp exposures ----------------------------------------------------------

def _extraction_setup(dark, flat, instrument):
    det = instrument.detectors["science"]
    master = np.asarray(dark["master"], float)
    response = np.asarray(flat["pixel_response"], float)
    good = np.asarray(dark["valid"], bool) & np.asarray(flat["valid"], bool)
    good &= np.isfinite(master) & np.isfinite(response) & (response > 0)
    rn = np.asarray(dark["read_noise"], float) * det.gain_e_per_adu
    typical = np.nanmedian(rn[good])
    rn = np.where(good & np.isfinite(rn), np.fmax(rn, typical), typical)
    prof = trace_profiles(np.asarray(flat["trace_y"], float),
                          np.asarray(flat["profile_sigma"], float), n_y=master.shape[0])
    return det, master, np.where(good, response, 1.0), good, rn, prof


def scan_spectra(raw, dark, flat, *, instrument, frames_per_chunk=16, max_saturated=0.001,
                 clip=6.0):
    """Extracted spectra of every frame of a lamp exposure.

    The lamp is steady, so the extraction weights are fixed from the exposure's mean
    frame (:func:`numerics.extraction.fixed_weight_extractor`: one matrix product per
    chunk of frames); frames with saturated or outlying pixels (cosmic rays) are
    extracted on their own by :func:`numerics.extraction.optimal_extract`. Two passes
    over the frames, a chunk at a time (bounded memory).

    Returns
    -------
    flux, variance : ndarray (frame, trace, x), e- per frame
    """
    det, master, response, good, rn, prof = _extraction_setup(dark, flat, instrument)
    core = prof.max(0) > 0.1

    def electrons(pix):
        if pix.shape[1:] != master.shape:
            raise BadInput(raw.path, f"frames {pix.shape[1:]} do not match the dark "
                                     f"{_where(dark, 'dark')} {master.shape}")
        sat = pix >= det.saturation_adu
        frac = (sat & core).sum() / (core.sum() * pix.shape[0])
        if frac > max_saturated:
            raise BadInput(raw.path, f"{100 * frac:.2f}% of the trace pixels are saturated; "
                                     "lamp frames must not saturate")
        valid = good & ~sat
        e = np.where(valid, (pix - master) * det.gain_e_per_adu / response, 0.0)
        return e, valid, (sat & good).any(axis=(1, 2))

    total, n = np.zeros(master.shape), 0
    for pix in _chunks(raw, frames_per_chunk):
        e, valid, _ = electrons(pix)
        total += e.sum(axis=0)
        n += e.shape[0]
    if n == 0:
        raise BadInput(raw.path, "no frames")
    extractor = fixed_weight_extractor(prof, rn ** 2 + np.maximum(total / n, 0.0), valid=good)
    flux, var = [], []
    for pix in _chunks(raw, frames_per_chunk):
        e, valid, saturated = electrons(pix)
        f, v, suspect = apply_fixed_weights(extractor, e, read_noise=rn, clip=clip)
        redo = np.flatnonzero(suspect | saturated)
        if redo.size:
            ext = optimal_extract(e[redo], prof, read_noise=rn, valid=valid[redo], clip=clip,
                                  nan_policy="mask")
            f[redo], v[redo] = ext.flux, ext.variance
        flux.append(f)
        var.append(v)
    return np.concatenate(flux), np.concatenate(var)


def _integral(t_s, y_s, t):
    """Integral from t_s[0] to t of the piecewise-linear interpolant of (t_s, y_s);
    y_s (sample, n), t (m,) -> (m, n). Constant extrapolation outside."""
    seg = np.diff(t_s)[:, None] * (y_s[1:] + y_s[:-1]) / 2
    cum = np.concatenate([np.zeros((1, y_s.shape[1])), np.cumsum(seg, 0)])
    tc = np.clip(t, t_s[0], t_s[-1])
    k = np.clip(np.searchsorted(t_s, tc) - 1, 0, t_s.size - 2)
    y_t = np.stack([np.interp(tc, t_s, y) for y in y_s.T], 1)
    out = cum[k] + (tc - t_s[k])[:, None] * (y_s[k] + y_t) / 2
    return out + (t - tc)[:, None] * y_t


def frame_opd(times, metro_time, metro_path, baselines):
    """Mean OPD and OPD travelled of every baseline during each frame.

    The mean is the exact average over the exposure of the metrology's
    piecewise-linear interpolant (unbiased for any sampling of either clock).

    Parameters
    ----------
    times : (start (frame,), exposure (frame,)) s
    metro_time : (sample,) s; metro_path : (sample, 4) m
    baselines : sequence of (i, j)

    Returns
    -------
    opd, span : ndarray (frame, baseline), m
    """
    start, exp = (np.asarray(a, float) for a in times)
    t = np.asarray(metro_time, float)
    path = np.asarray(metro_path, float)
    opd_t = np.stack([path[:, j] - path[:, i] for i, j in baselines], 1)
    mean = (_integral(t, opd_t, start + exp) - _integral(t, opd_t, start)) / exp[:, None]
    ends = [np.stack([np.interp(x, t, o) for o in opd_t.T], 1) for x in (start, start + exp)]
    return mean, np.abs(ends[1] - ends[0])


def ft_scan_counts(raw, ft_dark, *, instrument):
    """Dark-subtracted FT counts (ft_frame, output, ft_wave) e-, OPD and span per output."""
    det = instrument.detectors[instrument.fringe_tracker.detector]
    counts = np.asarray(raw.ft_counts(), float)
    master = np.asarray(ft_dark["master"], float)
    if counts.shape[1:] != master.shape:
        raise BadInput(raw.path, f"FT counts {counts.shape[1:]} do not match the FT dark "
                                 f"{_where(ft_dark, 'ft dark')} {master.shape}")
    if (counts >= det.saturation_adu).mean() > 0.001:
        raise BadInput(raw.path, "fringe-tracker lamp counts are saturated")
    period = float(raw.header["FTPERIOD"])
    t_end = np.asarray(raw.ft_time(), float)
    t, path = raw.metrology()
    opd, span = frame_opd((t_end - period, np.full(t_end.size, period)), t, path,
                          instrument.combiner.baselines)
    b = instrument.combiner.output_baseline
    return (counts - master) * det.gain_e_per_adu, opd[:, b], span[:, b]


def ft_mean_counts(raw, ft_dark, *, instrument):
    """Mean dark-subtracted FT counts (output, ft_wave), e- per frame."""
    det = instrument.detectors[instrument.fringe_tracker.detector]
    counts = np.asarray(raw.ft_counts(), float)
    return (counts.mean(0) - np.asarray(ft_dark["master"], float)) * det.gain_e_per_adu


# -- wavelengths ----------------------------------------------------------------------------

def _bandwidth_law(bw, bw_err, law, *, max_rel_err=0.02, decay=None, min_decay=0.01,
                   nominal_fwhm_px=None):
    """Per-trace LSF FWHM in pixels from the measured bandwidths; traces whose own
    measurement is poorer than ``max_rel_err``, or whose scan covers too little of the
    envelope (``decay``, the fractional envelope drop at the largest OPD fitted, below
    ``min_decay``), adopt the median of the others. When no trace is measurable (a scan
    much shorter than the coherence length, as at high resolution) the instrument
    model's ``nominal_fwhm_px`` is adopted for every trace, if given."""
    disp = np.abs(np.gradient(law, axis=1))                        # m / px
    fw = bw / disp
    ok = np.isfinite(fw) & np.isfinite(bw_err) & (bw_err > 0)
    if decay is not None:
        ok &= np.asarray(decay) >= min_decay
    w = np.where(ok, (disp / bw_err) ** 2, 0.0)
    wsum = w.sum(1)
    mean = np.where(wsum > 0, (w * np.nan_to_num(fw)).sum(1) / np.maximum(wsum, 1e-300), np.nan)
    rel = 1 / np.sqrt(np.maximum(wsum, 1e-300)) / np.where(np.isfinite(mean), mean, 1.0)
    measured = np.isfinite(mean) & (rel < max_rel_err)
    if not measured.any():
        if nominal_fwhm_px is None:
            raise ValueError("no trace has a measurable fringe envelope: the scan is too "
                             "short for the bandwidth")
        fwhm_px = np.full(mean.shape, float(nominal_fwhm_px))
        return fwhm_px[:, None] * disp, fwhm_px, measured
    fwhm_px = np.where(measured, mean, np.median(mean[measured]))
    return fwhm_px[:, None] * disp, fwhm_px, measured


def _median_filled(a, *, samples_per_block=2_000_000):
    """Copy of ``a`` (sample, trace, ...) with each NaN sample replaced by its pixel's
    median over samples (0 for a pixel never extracted), a block of traces at a time."""
    out = np.empty(a.shape, float)
    per_trace = max(1, a.size // max(a.shape[1], 1))
    block = max(1, samples_per_block // per_trace)
    for t0 in range(0, a.shape[1], block):
        y = a[:, t0:t0 + block]
        ok = np.isfinite(y)
        out[:, t0:t0 + block] = y
        holes = ~ok.all(axis=0)                        # pixels with a NaN sample: medians
        if holes.any():                                # of those alone (most have none)
            sub = np.where(ok[:, holes], y[:, holes], np.nan)
            with warnings.catch_warnings():           # all-NaN pixels: dead, 0 here
                warnings.simplefilter("ignore", RuntimeWarning)
                med = np.nanmedian(sub, axis=0)
            out[:, t0:t0 + block][:, holes] = np.nan_to_num(np.where(np.isnan(sub), med, sub))
    return out


def _fit_scan_by_traces(intensity, opd, span, wave_guess, *, min_snr, max_opd,
                        samples_per_block=2_000_000):
    """:func:`fit_fringe_scan` over blocks of traces (every pixel is fitted on its own,
    so the result is the same; the fit's working copies stay a block's size, not the
    channel's: 1200 scan frames of 48 traces x 256 pixels are 118 MB per array).
    NaN samples (not extracted) are replaced by the pixel's median first. Also returns
    the largest |OPD| fitted per pixel. intensity (frame, trace, x); opd, span
    broadcastable to it; wave_guess, max_opd broadcastable to (trace, x)."""
    n_s, n_tr = intensity.shape[:2]
    pshape = intensity.shape[1:]
    per_trace = max(1, int(np.prod(intensity.shape[2:])) * n_s)
    block = max(1, samples_per_block // per_trace)
    opd_b = np.broadcast_to(opd, intensity.shape)
    span_b = None if span is None else np.broadcast_to(span, intensity.shape)
    guess = np.broadcast_to(np.asarray(wave_guess, float), pshape)
    limit = None if max_opd is None else np.broadcast_to(np.asarray(max_opd, float), pshape)
    fits, reach = [], []
    for t0 in range(0, n_tr, block):
        sl = slice(t0, t0 + block)
        fill = _median_filled(intensity[:, sl])
        fits.append(fit_fringe_scan(fill, opd_b[:, sl], guess[sl],
                                    opd_span=None if span_b is None else span_b[:, sl],
                                    min_snr=min_snr,
                                    max_opd=None if limit is None else limit[sl]))
        o = np.abs(opd_b[:, sl])
        reach.append((o if limit is None else np.where(o <= limit[sl], o, 0.0)).max(axis=0))
    fit = ScanFit(**{f.name: np.concatenate([getattr(b, f.name) for b in fits])
                     for f in dataclasses.fields(ScanFit)})
    return fit, np.concatenate(reach)


def wavecal_products(intensity, opd, span, wave_guess, *, law_deg=3, axes=("trace", "x"),
                     min_snr=5.0, max_bw_rel_err=0.02, max_opd=None,
                     min_envelope_decay=0.0, trim_grid=True, nominal_fwhm_px=None,
                     trace_baseline=None, n_pol=1, n_baseline=6) -> dict:
    """Wavelength products of a channel from scan intensities (frame, trace, x);
    ``max_opd`` (m, broadcastable to (trace, x)) limits the fit to the central packet.
    ``trim_grid`` False keeps one grid point per pixel (a channel calibrated per pixel,
    never resampled: the fringe tracker). With ``trace_baseline`` (trace,) (traces
    ordered output * n_pol + pol) the product also holds each baseline's effective
    bandwidth on the grid (:func:`numerics.wavelength.baseline_bandwidth`)."""
    dead = ~np.isfinite(intensity).all(axis=0)               # pixels never extracted
    fit, opd_reach = _fit_scan_by_traces(intensity, opd, span, wave_guess, min_snr=min_snr,
                                         max_opd=max_opd)
    wave = np.where(dead, np.nan, fit.wave)
    law, coeffs, used, x_ref, x_scale = fit_dispersion_law(wave, fit.wave_err, deg=law_deg)
    k4 = np.pi ** 2 / (4 * np.log(2))
    decay = 1 - np.exp(-k4 * (fit.bandwidth / law ** 2 * opd_reach) ** 2)
    bw, fwhm_px, measured = _bandwidth_law(np.where(dead, np.nan, fit.bandwidth),
                                           fit.bandwidth_err, law, max_rel_err=max_bw_rel_err,
                                           decay=decay, min_decay=min_envelope_decay,
                                           nominal_fwhm_px=nominal_fwhm_px)
    grid = common_grid(law, extrapolate_px=0.5 if trim_grid else np.inf)
    bw_grid = np.median(np.stack([np.interp(grid, law[k], bw[k]) for k in range(law.shape[0])]),
                        axis=0)
    res = np.where(used, wave - law, np.nan)
    extra = {}
    if trace_baseline is not None:
        n_tr = law.shape[0]
        extra["bandwidth_baseline"] = Array(
            baseline_bandwidth(law, bw, grid, trace_baseline, np.arange(n_tr) % n_pol,
                               n_baseline=n_baseline, n_pol=n_pol),
            ("pol", "baseline", "wave"), "m",
            "effective fringe bandwidth of each baseline on the grid (its traces' line-spread "
            "and the linear resampling)")
    return {**extra,
            "wave_pixel": Array(law, axes, "m", "effective vacuum wavelength (smooth law)"),
            "bandwidth_pixel": Array(bw, axes, "m", "effective FWHM bandwidth"),
            "law_coeffs": Array(coeffs, (axes[0], "coef"), "m",
                                "polynomial in (x - x_ref) / x_scale, lowest order first"),
            "wave_grid": Array(grid, ("wave",), "m", "common grid: median law over traces"),
            "bandwidth_grid": Array(bw_grid, ("wave",), "m"),
            "wave_measured": Array(wave, axes, "m", "QC: per-pixel fringe wavelength"),
            "wave_err": Array(fit.wave_err, axes, "m", "QC: its 1-sigma error"),
            "bandwidth_measured": Array(fit.bandwidth, axes, "m", "QC: per-pixel envelope"),
            "fringe_snr": Array(fit.snr, axes, "", "QC"),
            "law_residual_rms": Array(np.sqrt(np.nanmean(res ** 2, axis=1)), (axes[0],), "m",
                                      "QC: RMS of measured minus law"),
            "lsf_fwhm_px": Array(fwhm_px, (axes[0],), "px", "line-spread FWHM per trace"),
            "bandwidth_is_measured": Array(measured, (axes[0],), "",
                                           "False: median of the other traces adopted"),
            "x_ref": x_ref, "x_scale": x_scale, "n_law_rejected": int((~used & ~dead).sum()),
            "bandwidth_source": ("scan envelope" if measured.any() else
                                 "instrument model line-spread (scan too short to measure)")}


def wavecal_science(raw, dark, flat, *, instrument, setup_name, polmode, window=2.0,
                    frames_per_chunk=16, **kw) -> dict:
    """Wavelength products of a science channel from its delay scan; the fit is limited
    to ``window`` nominal coherence lengths of zero OPD. ``kw`` go to
    :func:`wavecal_products`."""
    check_raw([raw], kind="lamp-scan", setup=setup_name, polmode=polmode)
    setup, comb = instrument.setup(setup_name), instrument.combiner
    flux, var = scan_spectra(raw, dark, flat, instrument=instrument,
                             frames_per_chunk=frames_per_chunk)
    opd, span = frame_opd(raw.frame_times(), *raw.metrology(), comb.baselines)
    base = comb.output_baseline[np.arange(flux.shape[1]) // setup.n_pol(polmode)]
    guess = np.broadcast_to(setup.nominal_wavelength_m(), flux.shape[1:])
    bw = setup.channel_fwhm_px * setup.dispersion_m_per_px
    out = wavecal_products(flux, opd[:, base, None], span[:, base, None], guess,
                           max_opd=window * guess ** 2 / bw,
                           nominal_fwhm_px=setup.channel_fwhm_px, trace_baseline=base,
                           n_pol=setup.n_pol(polmode), n_baseline=len(comb.baselines), **kw)
    # The combiner calibration fits the same scan: it reads these spectra back instead of
    # extracting the 1000-odd frames again (float32: 1e-7 relative, far below the photon
    # noise of a lamp frame). The dark and flat keys say which calibrations made them.
    out.update(scan_spectra_of(raw, dark, flat, flux, var))
    return out


def scan_spectra_of(raw, dark, flat, flux, var) -> dict:
    """Outputs holding a scan's extracted spectra (frame, trace, x) and what made them."""
    return {"scan_flux": Array(flux.astype(np.float32), ("frame", "trace", "x"), "e-",
                               "optimally extracted spectra of every scan frame"),
            "scan_var": Array(var.astype(np.float32), ("frame", "trace", "x"), "e2",
                              "their variances"),
            "scan_file": str(raw.path), "scan_dark_key": str(getattr(dark, "key", "") or ""),
            "scan_flat_key": str(getattr(flat, "key", "") or "")}


def stored_scan_spectra(wavecal, raw, dark, flat):
    """(flux, variance) of ``raw`` kept by the wavelength calibration when it extracted
    the same file with the same dark and flat products (by key), else None."""
    a = getattr(wavecal, "attrs", {})
    keys = (str(getattr(dark, "key", "") or ""), str(getattr(flat, "key", "") or ""))
    if ("scan_flux" not in wavecal or a.get("scan_file") != str(raw.path) or not all(keys)
            or (a.get("scan_dark_key"), a.get("scan_flat_key")) != keys):
        return None
    return (np.asarray(wavecal["scan_flux"], float), np.asarray(wavecal["scan_var"], float))


def wavecal_ft(raw, ft_dark, *, instrument, window=0.6, **kw) -> dict:
    """Wavelength products of the fringe tracker (axes output, ft_wave; one grid point
    per pixel) from a delay scan's FT frames."""
    check_raw([raw], kind="lamp-scan")
    counts, opd, span = ft_scan_counts(raw, ft_dark, instrument=instrument)
    ft = instrument.fringe_tracker
    guess = np.broadcast_to(ft.nominal_wavelength_m(), counts.shape[1:])
    bw = ft.channel_fwhm_px * (ft.wave_max_m - ft.wave_min_m) / (ft.n_wave - 1)
    return wavecal_products(counts, opd[..., None], span[..., None], guess,
                            max_opd=window * guess ** 2 / bw, axes=("output", "ft_wave"),
                            trim_grid=False, **kw)


# -- combiner -------------------------------------------------------------------------------

def _to_pol_output(a, n_pol):
    """(..., trace, wave) with trace = output * n_pol + pol -> (..., pol, output, wave)."""
    s = a.shape
    return np.moveaxis(a.reshape(s[:-2] + (s[-2] // n_pol, n_pol, s[-1])), -2, -3)


def combiner_products(beam_flux, scan_intensity, scan_var, opd, span, *, wave_pixel,
                      bandwidth_pixel, wave_grid, n_pol, instrument, resample=True,
                      window_coherence=0.5, transmission_deg=3, qc_frames=256) -> dict:
    """Combiner calibration from single-beam mean spectra and the delay scan.

    Parameters
    ----------
    beam_flux : (telescope, trace, x) mean flux with telescope i lit
    scan_intensity, scan_var : (frame, trace, x); opd, span : broadcastable, m
    wave_pixel, bandwidth_pixel : (trace, x) m; wave_grid : (wave,) m
    resample : bool -- resample traces to ``wave_grid`` (science); False for the fringe
        tracker, calibrated per pixel (its ``wave`` axis is the FT pixel)
    window_coherence : float -- fringe phasors are fitted within this many coherence
        lengths lambda^2 / bandwidth of zero OPD
    transmission_deg : int -- the resampled (science) shares are replaced by a polynomial
        of this degree in wavelength (:func:`combiner_model.smooth_transmissions`); -1
        keeps the per-channel values. The fringe tracker, calibrated per pixel with the
        pixel response inside its shares, is never smoothed.
    qc_frames : int -- the model's residuals (QC) use at most this many scan frames near
        zero OPD, evenly spaced
    """
    comb = instrument.combiner
    if not resample:     # per-pixel channel: refer every output to the median wavelength
        q = _lamp_shape_correction(beam_flux.sum(0), wave_pixel, wave_grid)
        beam_flux, scan_intensity, scan_var = beam_flux * q, scan_intensity * q, scan_var * q ** 2
    fill = _median_filled(scan_intensity)
    wave_pixel, bandwidth_pixel = np.asarray(wave_pixel), np.asarray(bandwidth_pixel)
    max_opd = window_coherence * wave_pixel ** 2 / bandwidth_pixel
    z, z_var, dc = fringe_phasor(fill, opd, wave_pixel, bandwidth_pixel,
                                 opd_span=span, max_opd=max_opd)
    del fill
    # model residuals on the frames near zero OPD on every baseline (farther out, the
    # chromatic phase inside a channel makes the per-pixel model only approximate)
    near = np.all(np.abs(np.broadcast_to(opd, scan_intensity.shape)) <= max_opd, axis=(1, 2))
    near = np.flatnonzero(near) if near.any() else np.arange(near.size)
    # QC of the model on at most qc_frames of them, evenly spaced (its figures are
    # statistics; all 1200 frames of a long scan would only cost memory)
    near = near[np.unique(np.linspace(0, near.size - 1, min(near.size, qc_frames)).round()
                          .astype(int))]
    if resample:
        def grid(a, v=None):
            v = np.zeros(a.shape) if v is None else v
            return resample_to_grid(a, v, wave_pixel, wave_grid)
        beam = grid(beam_flux)[0]
        zg, dcg = grid(z)[0], grid(dc)[0]
        intens, ivar = grid(scan_intensity[near], scan_var[near])
    else:
        beam, zg, dcg = beam_flux, z, dc
        intens, ivar = scan_intensity[near], scan_var[near]
    t = t_measured = cm.transmissions(_to_pol_output(beam, n_pol))
    if resample and transmission_deg >= 0:
        # photon noise of a share ~ 1 / sqrt(the telescope's total flux in that channel)
        total = _to_pol_output(beam, n_pol).sum(axis=2)                 # (telescope, pol, wave)
        weight = np.sqrt(np.clip(total, 0, None)).transpose(1, 0, 2)[:, None]
        t = cm.smooth_transmissions(t_measured, wave_grid, deg=transmission_deg, weight=weight)
    contrast, phase, lamp = cm.contrast_and_phase(_to_pol_output(zg, n_pol),
                                                  _to_pol_output(dcg, n_pol), t, comb.output_pair)
    v2pm = cm.build_v2pm(t, contrast, phase, comb.output_pair, n_baseline=len(comb.baselines))
    weights = cm.output_noise_weights(v2pm)
    p2vm = cm.weighted_pinv(v2pm, weights=weights)
    res, chi2 = cm.model_residuals(v2pm, p2vm, _to_pol_output(intens, n_pol),
                                   variance=_to_pol_output(ivar, n_pol))
    closure, imbalance, off = cm.phase_set_qc(phase, comb.output_nominal_phase_rad)
    pow_, pw, pb = ("pol", "output", "wave"), ("pol", "wave"), ("pol", "baseline", "wave")
    return {"transmission": Array(t, ("pol", "output", "telescope", "wave"), "",
                                  "share of each telescope's flux per output"),
            "transmission_measured": Array(t_measured, ("pol", "output", "telescope", "wave"), "",
                                           "QC: per-channel shares before smoothing"),
            "transmission_deg": int(transmission_deg if resample else -1),
            "contrast": Array(contrast, pow_, ""), "phase_shift": Array(phase, pow_, "rad"),
            "v2pm": Array(v2pm, ("pol", "wave", "output", "unknown"), "",
                          "columns F_0..F_3, Re C_01..Re C_23, Im C_01..Im C_23"),
            "p2vm": Array(p2vm, ("pol", "wave", "unknown", "output"), "",
                          "noise-weighted pseudo-inverse of v2pm"),
            "condition": Array(cm.condition_number(v2pm), pw, ""),
            "output_weights": Array(weights, ("pol", "wave", "output"), "",
                                    "relative inverse variances used in p2vm"),
            "lamp_flux": Array(lamp, ("pol", "telescope", "wave"), "e-", "scan lamp F_i"),
            "model_chi2": Array(chi2, pw, "", "QC: reduced chi2 of the model on scan frames "
                                              "near zero OPD (at most qc_frames)"),
            "residual_rms": Array(np.sqrt(np.nanmean(res ** 2, axis=0)), pow_, "e-", "QC"),
            "phase_closure": Array(closure, pb, "rad", "QC: 0 for an ordered ABCD set"),
            "phase_imbalance": Array(imbalance, pb, "", "QC: |mean exp(i theta)|"),
            "phase_offset_rms": Array(off, pb, "rad", "QC: scatter of theta - nominal"),
            "wave": Array(np.asarray(wave_grid, float), ("wave",), "m")}


def _lamp_shape_correction(flux, wave, grid, deg=2):
    """Factor exp(P(grid_p) - P(wave_kp)) that refers each output's pixel p to the
    common wavelength grid_p for the lamp's spectral shape P (a polynomial in
    wavelength common to all outputs, fitted to log flux with a free offset per output).
    Without it, outputs whose pixels sit at slightly different wavelengths would carry
    the lamp's spectral slope into their transmissions. flux, wave: (output, pix)."""
    lf = np.log(np.maximum(np.asarray(flux, float), 1e-30))
    w = np.asarray(wave, float)
    n_out, n_pix = w.shape
    xs = (w - grid.mean()) / np.ptp(grid)
    design = np.zeros((n_out * n_pix, n_out + deg))
    design[np.arange(n_out * n_pix), np.repeat(np.arange(n_out), n_pix)] = 1.0
    for d in range(1, deg + 1):
        design[:, n_out + d - 1] = (xs ** d).ravel()
    coef = np.linalg.lstsq(design, lf.ravel(), rcond=None)[0][n_out:]
    xg = (np.asarray(grid, float) - grid.mean()) / np.ptp(grid)

    def shape(x):
        return sum(c * x ** (d + 1) for d, c in enumerate(coef))
    return np.exp(shape(xg)[None, :] - shape(xs))


def require_beams(raws):
    """Single-beam exposures by telescope (0-based); MissingCalibration if one is absent."""
    lit = {}
    for r in raws:
        lit.setdefault(int(r.header["LAMPTEL"]) - 1, r)
    missing = sorted(set(range(4)) - set(lit))
    if missing:
        where = raws[0].path if raws else "lamp-beam"
        raise MissingCalibration(where, f"no single-beam lamp exposure for beam(s) "
                                        f"{[m + 1 for m in missing]}")
    return [lit[i] for i in range(4)]


def combiner_science(beam_raws, scan, *, dark_beam, dark_scan, flat, wavecal, instrument,
                     setup_name, polmode, window=0.5, frames_per_chunk=16,
                     transmission_deg=3) -> dict:
    """Combiner products of a science channel from its four single-beam exposures and
    its delay scan (extracted with the flat, resampled to the wavecal grid)."""
    beams = require_beams(beam_raws)
    check_raw(beams, kind="lamp-beam", setup=setup_name, polmode=polmode)
    check_raw([scan], kind="lamp-scan", setup=setup_name, polmode=polmode)
    n_pol = instrument.setup(setup_name).n_pol(polmode)
    kw = dict(instrument=instrument, frames_per_chunk=frames_per_chunk)
    beam = np.stack([np.nanmean(scan_spectra(r, dark_beam, flat, **kw)[0], 0) for r in beams])
    stored = stored_scan_spectra(wavecal, scan, dark_scan, flat)
    if stored is None:          # rounded as stored: the same products either way
        stored = [a.astype(np.float32).astype(float)
                  for a in scan_spectra(scan, dark_scan, flat, **kw)]
    flux, var = stored
    opd, span = frame_opd(scan.frame_times(), *scan.metrology(), instrument.combiner.baselines)
    base = instrument.combiner.output_baseline[np.arange(flux.shape[1]) // n_pol]
    return combiner_products(beam, flux, var, opd[:, base, None], span[:, base, None],
                             wave_pixel=wavecal["wave_pixel"],
                             bandwidth_pixel=wavecal["bandwidth_pixel"],
                             wave_grid=wavecal["wave_grid"], n_pol=n_pol, instrument=instrument,
                             window_coherence=window, transmission_deg=transmission_deg)


def combiner_ft(beam_raws, scan, *, ft_dark, wavecal, instrument, window=0.5) -> dict:
    """Combiner products of the fringe tracker, per FT pixel (no resampling)."""
    beams = require_beams(beam_raws)
    check_raw(beams, kind="lamp-beam")
    check_raw([scan], kind="lamp-scan")
    counts, opd, span = ft_scan_counts(scan, ft_dark, instrument=instrument)
    beam = np.stack([ft_mean_counts(r, ft_dark, instrument=instrument) for r in beams])
    rn2 = instrument.detectors[instrument.fringe_tracker.detector].read_noise_e ** 2
    return combiner_products(beam, counts, np.abs(counts) + rn2, opd[..., None],
                             span[..., None], wave_pixel=wavecal["wave_pixel"],
                             bandwidth_pixel=wavecal["bandwidth_pixel"],
                             wave_grid=wavecal["wave_grid"], n_pol=1, instrument=instrument,
                             resample=False, window_coherence=window)
