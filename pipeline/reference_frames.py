# SPDX-License-Identifier: BSD-3-Clause
"""Phase referencing of one exposure from its ``extract`` product.

Glue between the product and the kernels of ``pipeline.numerics.phase_reference``:
the FT stream is read in chunks of frames for the per-frame estimates (phase,
group delay, SNR); the sequential steps (tracking, flags) then run on the small
(ft_frame, baseline) arrays; the science side works per science frame.
"""

from __future__ import annotations

import numpy as np
from astropy.time import Time

from .errors import BadInput
from .geometry import hour_angle_rad
from .numerics.phase_reference import (FLAG_CLOSURE, FLAG_FRINGE_JUMP, FLAG_GD_EXCURSION,
                                       FLAG_LOW_SNR, dual_field_delay, flag_ft_frames,
                                       frame_windows, fringe_estimates, mean_phasor,
                                       reference_coherent, track_opd, window_fraction,
                                       window_mean)
from .stage import Array

__all__ = ["ft_estimates", "reference_exposure"]


def _rows(ext, name, start, stop):
    """Rows of a dataset of a product view, or of a plain mapping of arrays."""
    if hasattr(ext, "rows"):
        return ext.rows(name, start, stop)
    return np.asarray(ext[name][start:stop])


def _length(ext, name) -> int:
    return ext.shape(name)[0] if hasattr(ext, "shape") else len(ext[name])


def ft_estimates(ext, *, chunk: int = 8192):
    """Phase, group delay, SNR and per-telescope flux of every FT frame, reading the FT
    stream in chunks. Returns (phase, group_delay, snr (ft_frame, baseline), flux
    (ft_frame, telescope) summed over ft_wave, wave_ref)."""
    wave = np.asarray(ext["ft_wave"], float)
    n = _length(ext, "ft_coherent")
    if n == 0:
        raise BadInput(getattr(ext, "path", "extract product"), "no fringe-tracker frames")
    parts, flux = [], []
    for a in range(0, n, chunk):
        parts.append(fringe_estimates(_rows(ext, "ft_coherent", a, a + chunk), wave,
                                      ft_coherent_var=_rows(ext, "ft_coherent_var", a, a + chunk)))
        flux.append(_rows(ext, "ft_flux", a, a + chunk).sum(axis=-1))
    return (np.concatenate([p.phase for p in parts]),
            np.concatenate([p.group_delay for p in parts]),
            np.concatenate([p.snr for p in parts]), np.concatenate(flux), parts[0].wave_ref)


def reference_exposure(ext, *, instrument, snr_min: float, max_group_delay: float,
                       window: int, guard: int, max_rejected_fraction: float,
                       min_contrast: float, weight_by_ft_flux: bool = True,
                       chunk: int = 8192) -> dict:
    """Outputs of the ``reference`` stage for one exposure (see DEVELOPERS.md).

    Parameters
    ----------
    ext : mapping name -> array with ``.attrs`` (the ``extract`` product)
    instrument : pipeline.instrument.Instrument
    snr_min, max_group_delay (m), window (FT frames), guard (FT frames)
        FT frame selection (:func:`pipeline.numerics.phase_reference.flag_ft_frames`)
    max_rejected_fraction : float, a science frame is invalid on a baseline when
        more than this fraction of its FT frames are flagged
    min_contrast : float, a science frame is invalid when its contrast loss,
        averaged over wavelength, is below this
    weight_by_ft_flux : bool, weight the FT phasors by the FT photometry (the contrast
        loss then includes the decorrelation by coupling fluctuations within a frame)
    """
    attrs = ext.attrs
    where = getattr(ext, "path", "extract product")
    if attrs.get("kind") not in ("science", "calibrator"):
        raise BadInput(where, f"phase referencing needs a science or calibrator exposure, "
                              f"found {attrs.get('kind')!r}")
    baselines = instrument.combiner.baselines
    phase, gd, snr, ft_flux, wave_ref = ft_estimates(ext, chunk=chunk)
    opd = track_opd(phase, gd, wave_ref=wave_ref, window=window)
    flags = flag_ft_frames(snr, gd, opd, wave_ref=wave_ref, baselines=baselines,
                           triangles=instrument.combiner.triangles, snr_min=snr_min,
                           max_group_delay=max_group_delay, window=window, guard=guard)
    period = float(attrs["ft_period"])
    ft_mid = np.asarray(ext["ft_time"], float) - 0.5 * period
    start, exp = np.asarray(ext["frame_start"], float), np.asarray(ext["frame_exp"], float)
    wave = np.asarray(ext["wave"], float)
    lo, hi = frame_windows(ft_mid, start, exp)
    phasor = mean_phasor(opd, lo, hi, wave, flux=ft_flux if weight_by_ft_flux else None,
                         baselines=baselines)
    loss = np.abs(phasor)
    bad_fraction = window_fraction(flags != 0, lo, hi)                 # (frame, baseline)

    mid_s = start + 0.5 * exp
    t = Time(attrs["mjd_obs"] + mid_s / 86400.0, format="mjd", scale="utc")
    lon, lat = instrument.site.longitude_deg, np.deg2rad(instrument.site.latitude_deg)
    path = window_mean(np.asarray(ext["metrology_path"], float),
                       np.asarray(ext["metrology_time"], float), start, exp)
    h_sc = hour_angle_rad(t, attrs["ra_deg"], lon)
    # the same sidereal times for the FT star (astropy's apparent sidereal time is the
    # costly part): h_ft = LST - ra_ft = h_sc + ra_sc - ra_ft, wrapped alike
    h_ft = (h_sc + np.deg2rad(attrs["ra_deg"] - attrs["ft_ra_deg"]) + np.pi) % (2 * np.pi) - np.pi
    delay = dual_field_delay(h_sc, h_ft, path,
                             dec_sc_rad=np.deg2rad(attrs["dec_deg"]),
                             dec_ft_rad=np.deg2rad(attrs["ft_dec_deg"]),
                             station_enu_m=np.asarray(ext["station_enu"], float),
                             latitude_rad=lat, baselines=baselines)
    ref = reference_coherent(np.asarray(ext["coherent"]), phasor, delay, wave)
    finite = np.isfinite(loss)
    mean_loss = np.where(finite, loss, 0.0).sum(-1) / np.maximum(finite.sum(-1), 1)
    valid = ((bad_fraction <= max_rejected_fraction) & (hi - lo > 0)[:, None]
             & (mean_loss >= min_contrast) & np.isfinite(ref).any(axis=(1, 3)))
    ft_bad = (flags != 0).mean(axis=0)
    return {
        "coherent_ref": Array(ref, ("frame", "pol", "baseline", "wave"), "e-/s",
                              "referenced coherent flux; amplitude still includes contrast_loss"),
        "frame_valid": Array(valid, ("frame", "baseline"), "", "True = usable"),
        "contrast_loss": Array(loss, ("frame", "baseline", "wave"), "",
                               "|<exp(-2 pi i (r_j - r_i) / lambda)>| over the frame" + (
                                   ", weighted by the FT coupling" if weight_by_ft_flux else "")),
        "ft_phase": Array(phase, ("ft_frame", "baseline"), "rad"),
        "ft_snr": Array(snr, ("ft_frame", "baseline"), ""),
        "ft_group_delay": Array(gd, ("ft_frame", "baseline"), "m"),
        "ft_opd": Array(opd, ("ft_frame", "baseline"), "m", "tracked residual path r_j - r_i"),
        "ft_flag": Array(flags, ("ft_frame", "baseline"), "",
                         f"bits: {FLAG_LOW_SNR} low SNR, {FLAG_GD_EXCURSION} group-delay "
                         f"excursion, {FLAG_FRINGE_JUMP} fringe jump, {FLAG_CLOSURE} closure"),
        "dual_field_delay": Array(delay, ("frame", "baseline"), "m", "D_ij"),
        "wave": Array(wave, ("wave",), "m"),
        "ft_wave_ref": wave_ref,
        "contrast_loss_weighting": "ft_flux" if weight_by_ft_flux else "none",
        "ft_rejected_fraction": [float(x) for x in ft_bad],
        "frame_rejected_fraction": [float(x) for x in 1 - valid.mean(axis=0)],
        "lock_loss_fraction": float(((flags & (FLAG_LOW_SNR | FLAG_GD_EXCURSION)) != 0).mean()),
        "fringe_jump_fraction": float(((flags & (FLAG_FRINGE_JUMP | FLAG_CLOSURE)) != 0).mean()),
    }
