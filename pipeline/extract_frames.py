# SPDX-License-Identifier: BSD-3-Clause
"""Extraction of one exposure, both channels: raw frames -> fluxes and coherent fluxes.

Science channel, one chunk of frames at a time (memory: one chunk): background
(sky exposure of the same set-up, polarisation mode and DIT, else the master
dark) subtracted, converted to electrons, divided by the flat's pixel response;
bad (dark and flat masks) and saturated pixels excluded; optimal extraction
with the flat's profiles and resampling to the common wavelength grid
(``pipeline.numerics.extraction``); P2VM of the channel
(``pipeline.numerics.coherent_flux``).

Fringe-tracker channel: a lazy dask pipeline over chunks of FT frames
(dark-subtracted rates and their variance, P2VM of the ``ft`` combiner
product); the store writes it chunk by chunk.

Products (``upstream`` views) are read by name (DEVELOPERS.md product table);
anything mapping names to arrays works (tests pass dicts).
"""

from __future__ import annotations

import hashlib
import inspect
import os
import threading

import numpy as np

from .errors import BadInput
from .numerics.coherent_flux import counts_to_rate, invert_combiner, traces_to_outputs
from .numerics.darks import clipped_stack, master_dark, robust_centre, robust_scale
from .numerics.extraction import optimal_extract, resample_to_grid
from .numerics.traces import trace_profiles
from .stage import Array
from .store import computed_here

# the master-dark estimator's floor on the clipping scale (numerics.darks.master_dark)
_SCALE_FLOOR = inspect.signature(master_dark).parameters["scale_floor"].default

__all__ = ["sky_background", "extract_science", "extract_ft", "exposure_facts"]


def _where(view, default):
    return str(getattr(view, "path", default))


def _blocks(dask_array):
    for block in dask_array.blocks:
        yield np.asarray(computed_here(block), float)


def _read_noise_map(rn, good, *, noisy_factor: float = 3.0):
    """Per-pixel read noise to use: a noise map from a few dark frames is itself noisy
    (its median is biased low, e.g. by sqrt(ln 2) ~ 0.83 for two frame pairs), so every
    pixel gets the rms over usable pixels (an unbiased variance), except pixels
    ``noisy_factor`` times noisier, which keep their own."""
    sel = good & np.isfinite(rn)
    r2 = np.sort(rn[sel] ** 2) if sel.any() else np.sort(rn[np.isfinite(rn)] ** 2)
    typical = np.sqrt(r2[: max(1, int(0.995 * r2.size))].mean())    # trim the noisiest 0.5 %
    return np.where(np.isfinite(rn) & (rn > noisy_factor * typical), rn, typical)


def _extraction_weights(flux, profiles, var_pix, valid):
    """Sum over a chunk's frames of the optimal-extraction weights (trace, y, x): the
    extracted flux of trace k in column x is sum_y w_ky D_y with w = P / V / sum_y P^2 / V
    (Horne 1986, PASP 98, 609), V = ``var_pix`` + the model's Poisson term, as in the
    extraction's last iteration (overlap between neighbouring traces neglected).

    flux (frame, trace, x) e- (NaN = not extracted); profiles (trace, y, x);
    var_pix (y, x) e-^2; valid (frame, y, x) bool.

    Column by column as matrix products over frames: sum_f P V_f^-1 / n_f =
    P * ((1 / n) @ V^-1), with the model sum_k P_k f_k and the norms n = P^2 @ V^-1 the
    same way (no (frame, trace, y, x) array)."""
    px = np.ascontiguousarray(profiles.transpose(2, 0, 1))                 # (x, trace, y)
    fx = np.nan_to_num(np.asarray(flux, float)).transpose(2, 0, 1)         # (x, frame, trace)
    model = fx @ px                                                        # (x, frame, y)
    ok = np.asarray(valid, bool).transpose(2, 0, 1)                        # (x, frame, y)
    ivar = np.where(ok, 1.0 / (var_pix.T[:, None, :] + np.maximum(model, 0.0)), 0.0)
    norm = (px * px) @ ivar.transpose(0, 2, 1)                             # (x, trace, frame)
    inv_norm = np.where(norm > 0, 1.0 / np.where(norm > 0, norm, 1.0), 0.0)
    return (px * (inv_norm @ ivar)).transpose(1, 2, 0)                     # (trace, y, x)


def sky_background(raw, *, frames_per_chunk: int = 16, kappa: float = 5.0) -> np.ndarray:
    """Clipped mean (the master-dark estimator, :func:`numerics.darks.clipped_stack`) of a
    sky exposure's frames, (y, x), ADU (bias, dark and sky included).

    Every on-sky exposure of a sequence subtracts the same sky: the result is kept per
    file (path, size, modification time) and parameters, so a process computes it once;
    callers must not modify it (it is returned read-only)."""
    if raw.nframe < 2:
        raise BadInput(raw.path, "a sky background needs at least 2 frames")
    st = os.stat(raw.path)
    key = (str(raw.path), st.st_size, st.st_mtime_ns, int(frames_per_chunk), float(kappa))

    def make():
        pix = raw.science_pixels(frames_per_chunk)

        def source():
            return _blocks(pix)
        centre, _ = robust_centre(source())
        master, _, _ = clipped_stack(source(), centre, robust_scale(source(), centre),
                                     kappa=kappa, scale_floor=_SCALE_FLOOR)
        return master
    return _kept(_SKY_CACHE, key, make, limit=8)          # a night has a few skies


_SKY_CACHE: dict = {}
_PROFILE_CACHE: dict = {}
_KEPT_LOCK = threading.Lock()


def _kept(cache: dict, key, make, *, limit: int) -> np.ndarray:
    """``make()``, kept in ``cache`` under ``key`` for the life of the process (read-only;
    the oldest entries dropped beyond ``limit``)."""
    with _KEPT_LOCK:
        if key in cache:
            return cache[key]
    value = make()
    value.setflags(write=False)
    with _KEPT_LOCK:
        cache[key] = value
        while len(cache) > limit:
            cache.pop(next(iter(cache)))
    return value


def _trace_profiles_cached(trace_y, profile_sigma, *, n_y):
    """:func:`numerics.traces.trace_profiles`, kept per process by content (every exposure
    of a set-up is extracted with its flat's profiles; read-only)."""
    key = (hashlib.blake2b(trace_y.tobytes() + profile_sigma.tobytes(),
                           digest_size=16).hexdigest(), trace_y.shape, int(n_y))
    return _kept(_PROFILE_CACHE, key, lambda: trace_profiles(trace_y, profile_sigma, n_y=n_y),
                 limit=4)                                 # a night has a few set-ups


def extract_science(raw, *, dark, flat, wavecal, combiner, instrument, background=None,
                    background_frames: int | None = None, frames_per_chunk: int = 8,
                    clip: float = 6.0) -> dict:
    """Fluxes and coherent fluxes of every science frame of ``raw``.

    Parameters
    ----------
    raw : pipeline.rawio.RawExposure
    dark, flat, wavecal, combiner : mappings name -> array (products, DEVELOPERS.md)
    instrument : pipeline.instrument.Instrument
    background : ndarray (y, x), ADU, or None
        Sky background (:func:`sky_background`); None subtracts the master dark.
    background_frames : int or None
        Frames averaged into ``background`` (default: the dark's ``n_frame``
        attribute when ``background`` is None). The noise of the subtracted
        image is the same in every frame, so it does not average down over
        frames: it is added to each frame's variance (it biases |C|^2 alike).
    frames_per_chunk : int, frames extracted at once
    clip : float, cosmic-ray rejection threshold of the optimal extraction, sigmas

    Returns
    -------
    dict of Array: ``flux``, ``flux_var`` (frame, pol, telescope, wave) e-/s;
    ``coherent`` (frame, pol, baseline, wave) complex e-/s; ``coherent_var``
    (same axes, (e-/s)^2, variance of each of Re and Im); ``wave`` m;
    ``n_rejected_pixels`` (frame,).
    """
    det = instrument.detectors["science"]
    n_pol = 2 if raw.polmode == "split" else 1
    p2vm = np.asarray(combiner["p2vm"], float)
    wave_grid = np.asarray(wavecal["wave_grid"], float)
    wave_pixel = np.asarray(wavecal["wave_pixel"], float)
    if p2vm.ndim != 4 or p2vm.shape[:2] != (n_pol, wave_grid.size):
        raise BadInput(_where(combiner, "combiner"),
                       f"p2vm of shape {p2vm.shape} does not match {n_pol} polarisation(s) and "
                       f"the wavelength grid of {wave_grid.size} points")
    master = np.asarray(dark["master"], float)
    bg = master if background is None else np.asarray(background, float)
    rn_e = np.asarray(dark["read_noise"], float) * det.gain_e_per_adu
    response = np.asarray(flat["pixel_response"], float)
    good = np.asarray(dark["valid"], bool) & np.asarray(flat["valid"], bool)
    good &= np.isfinite(bg) & np.isfinite(rn_e) & np.isfinite(response) & (response > 0)
    response = np.where(good, response, 1.0)
    trace_y = np.asarray(flat["trace_y"], float)
    if trace_y.shape[0] != 24 * n_pol or trace_y.shape != wave_pixel.shape:
        raise BadInput(_where(flat, "flat"),
                       f"trace_y of shape {trace_y.shape} does not fit {24 * n_pol} traces "
                       f"and wave_pixel {wave_pixel.shape}")
    profiles = _trace_profiles_cached(trace_y, np.asarray(flat["profile_sigma"], float),
                                      n_y=master.shape[0])
    rn_e = _read_noise_map(rn_e, good)
    sky_e = 0.0
    if background is not None:
        # the subtracted sky's photons still add their Poisson noise to every frame
        sky_e = np.where(good, np.clip((bg - master) * det.gain_e_per_adu, 0.0, None), 0.0)
    n_bg = background_frames if background is not None else getattr(dark, "attrs", {}).get(
        "n_frame")
    # per-pixel noise of one frame, plus that of the subtracted background image
    # variance of the subtracted image's own noise: common to every frame
    var_common = (rn_e ** 2 + sky_e) / n_bg if n_bg else None
    rn_e = np.sqrt((rn_e ** 2 + sky_e) * (1.0 + (1.0 / n_bg if n_bg else 0.0)))
    dit = raw.dit
    parts = {k: [] for k in ("flux", "flux_var", "coherent", "coherent_var", "n_rej")}
    w_sum, n_seen = np.zeros(profiles.shape), 0
    for pix in _blocks(raw.science_pixels(frames_per_chunk)):
        if pix.shape[1:] != master.shape:
            raise BadInput(raw.path, f"science frames are {pix.shape[1:]}, the dark "
                                     f"{_where(dark, 'dark')} is {master.shape}")
        valid = good & (pix < det.saturation_adu) & np.isfinite(pix)
        e = np.where(valid, (pix - bg) * det.gain_e_per_adu / response, 0.0)
        ext = optimal_extract(e, profiles, read_noise=rn_e, valid=valid, clip=clip,
                              nan_policy="mask")
        if var_common is not None:
            w_sum += _extraction_weights(ext.flux, profiles, rn_e ** 2, valid)
            n_seen += pix.shape[0]
        spec, var = resample_to_grid(ext.flux, ext.variance, wave_pixel, wave_grid)
        res = invert_combiner(traces_to_outputs(spec / dit, n_pol), p2vm,
                              variance=traces_to_outputs(var / dit ** 2, n_pol),
                              nan_policy="propagate")
        parts["flux"].append(res.flux)
        parts["flux_var"].append(res.flux_var)
        parts["coherent"].append(res.coherent)
        parts["coherent_var"].append(res.coherent_var)
        parts["n_rej"].append(ext.n_rejected)
    cat = {k: np.concatenate(v) for k, v in parts.items()}
    tel, base = ("frame", "pol", "telescope", "wave"), ("frame", "pol", "baseline", "wave")
    common = {}
    if var_common is not None and n_seen:
        # error of the exposure mean due to the subtracted image: the frames' mean
        # extraction weights applied to its per-pixel variance, then resampling and P2VM
        w_bar = w_sum / n_seen                                          # (trace, y, x)
        v_tr = np.einsum("kyx,yx->kx", w_bar ** 2, var_common)
        _, v_grid = resample_to_grid(np.zeros_like(v_tr), v_tr, wave_pixel, wave_grid)
        v_out = traces_to_outputs(v_grid / dit ** 2, n_pol)
        res = invert_combiner(np.zeros_like(v_out), p2vm, variance=v_out,
                              nan_policy="propagate")
        common = {
            "flux_var_common": Array(res.flux_var, tel[1:], "(e-/s)^2",
                                     "part of flux_var common to every frame (subtracted "
                                     "background noise), for the exposure mean"),
            "coherent_var_common": Array(res.coherent_var, base[1:], "(e-/s)^2",
                                         "part of coherent_var common to every frame "
                                         "(subtracted background noise), for the exposure mean")}
    return {**common,
        "flux": Array(cat["flux"], tel, "e-/s", "photometric flux per telescope"),
        "flux_var": Array(cat["flux_var"], tel, "(e-/s)^2"),
        "coherent": Array(cat["coherent"], base, "e-/s", "coherent flux C_ij"),
        "coherent_var": Array(cat["coherent_var"], base, "(e-/s)^2",
                              "variance of each of Re C and Im C"),
        "wave": Array(wave_grid, ("wave",), "m"),
        "n_rejected_pixels": Array(cat["n_rej"], ("frame",), "",
                                   "pixels rejected as outliers (cosmic rays)"),
        "background": "sky" if background is not None else "dark",
    }


def _ft_block(counts, dark, rn, p2vm, *, gain, period):
    """One chunk of FT frames -> (frame, 22, ft_wave) float32: F (4), Re C (6), Im C (6),
    var (6)."""
    rate, var = counts_to_rate(counts, dark, gain_e_per_adu=gain, read_noise_adu=rn,
                               dit_s=period, poisson="mean")
    # the variance is the block's mean one (poisson="mean"): propagated once, not per frame
    res = invert_combiner(rate[:, None], p2vm, variance=var[:1, None], nan_policy="propagate")
    return np.concatenate([res.flux[:, 0], res.coherent[:, 0].real, res.coherent[:, 0].imag,
                           res.coherent_var[:, 0]], axis=1).astype(np.float32)


def extract_ft(raw, *, ft_dark, ft_combiner, ft_wave, instrument,
               ft_frames_per_chunk: int = 4096) -> dict:
    """Fluxes and coherent fluxes of every fringe-tracker frame, as lazy dask arrays.

    Returns
    -------
    dict of Array: ``ft_flux`` (ft_frame, telescope, ft_wave) e-/s;
    ``ft_coherent`` (ft_frame, baseline, ft_wave) complex64 e-/s;
    ``ft_coherent_var`` (ft_frame, baseline, ft_wave) (e-/s)^2; ``ft_wave`` m.
    """
    det = instrument.detectors[instrument.fringe_tracker.detector]
    period = float(raw.header["FTPERIOD"])
    counts = raw.ft_counts(ft_frames_per_chunk)
    p2vm = np.asarray(ft_combiner["p2vm"], float)
    ft_wave = np.asarray(ft_wave, float)
    n_ftw = counts.shape[2]
    if p2vm.shape != (1, n_ftw, 16, 24) or ft_wave.shape != (n_ftw,):
        raise BadInput(_where(ft_combiner, "ft combiner"),
                       f"FT p2vm {p2vm.shape} / wavelengths {ft_wave.shape} do not match the "
                       f"{n_ftw} FT pixels of {raw.path}")
    dark = np.asarray(ft_dark["master"], float)
    rn = np.asarray(ft_dark["read_noise"], float)
    if dark.shape != counts.shape[1:]:
        raise BadInput(_where(ft_dark, "ft dark"), f"master {dark.shape} does not match FT "
                                                   f"counts {counts.shape[1:]} of {raw.path}")
    # one task per chunk feeds the three datasets (the store computes them together)
    parts = counts.map_blocks(_ft_block, dark, rn, p2vm, gain=det.gain_e_per_adu, period=period,
                              dtype=np.float32, chunks=(counts.chunks[0], (22,), (n_ftw,)))
    base = ("ft_frame", "baseline", "ft_wave")
    out = {"ft_flux": Array(parts[:, :4], ("ft_frame", "telescope", "ft_wave"), "e-/s"),
           "ft_coherent": Array((parts[:, 4:10] + 1j * parts[:, 10:16]).astype(np.complex64),
                                base, "e-/s"),
           "ft_coherent_var": Array(parts[:, 16:22], base, "(e-/s)^2",
                                    "variance of each of Re C and Im C")}
    out["ft_wave"] = Array(ft_wave, ("ft_wave",), "m")
    return out


def exposure_facts(raw, instrument) -> dict:
    """Times, metrology, station positions and pointing of one exposure, for the product."""
    start, exp = raw.frame_times()
    h = raw.header
    out = {"frame_start": Array(np.asarray(start, float), ("frame",), "s", "since DATE-OBS"),
           "frame_exp": Array(np.asarray(exp, float), ("frame",), "s"),
           "ft_time": Array(np.asarray(raw.ft_time(), float), ("ft_frame",), "s",
                            "end of each FT frame since DATE-OBS"),
           "kind": raw.kind, "object": str(h["OBJECT"]), "setup": raw.setup,
           "polmode": raw.polmode, "dit": raw.dit, "mjd_obs": raw.mjd,
           "date_obs": str(h["DATE-OBS"]), "ft_period": float(h["FTPERIOD"])}
    if raw.kind in ("sky", "calibrator", "science"):
        t, path = raw.metrology()
        names = {s.name: s.enu_m for s in instrument.stations}
        stations = [str(h[f"STATION{i}"]) for i in range(1, 5)]
        unknown = [s for s in stations if s not in names]
        if unknown:
            raise BadInput(raw.path, f"header stations {unknown} are not in the instrument model "
                                     f"({sorted(names)})")
        out.update({
            "metrology_time": Array(np.asarray(t, float), ("sample",), "s"),
            "metrology_path": Array(np.asarray(path, float), ("sample", "telescope"), "m"),
            "station_enu": Array(np.array([names[s] for s in stations], float),
                                 ("telescope", "enu"), "m"),
            "ra_deg": float(h["RA"]), "dec_deg": float(h["DEC"]),
            "ft_ra_deg": float(h["FTRA"]), "ft_dec_deg": float(h["FTDEC"]),
            "stations": ",".join(stations)})
        if raw.kind == "calibrator":
            out.update({"caldiam_mas": float(h["CALDIAM"]),
                        "caldiam_err_mas": float(h["CALDIAME"])})
    return out
