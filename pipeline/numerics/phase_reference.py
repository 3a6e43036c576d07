# SPDX-License-Identifier: BSD-3-Clause
"""Phase referencing of the science channel on the fringe tracker.

Phase model (DEVELOPERS.md, "The phase model"): on baseline (i, j) the
fringe tracker (FT) measures ``phi_ft = arg V_ft - 2 pi (r_j - r_i) / lambda_ft``
at about 1 kHz, the science channel integrates
``exp(-2 pi i (r_j - r_i + d_j - d_i) / lambda)`` over each frame. The steps:

1. per FT frame and baseline, the group delay (slope of the phase against
   wavenumber sigma = 1 / lambda across the FT pixels), the phase at the mean
   wavenumber sigma_0 of the coherent flux summed over the FT pixels after
   removing the group delay, and its signal-to-noise ratio (fringe tracking
   with group and phase delays: Lawson 2000, Principles of Long Baseline
   Stellar Interferometry, JPL 00-009, ch. 10);
2. the residual path r_j - r_i per FT frame: the phase unwrapped in time,
   with its whole number of fringes fixed by the (smoothed) group delay;
3. frame selection: lock losses (low SNR, group-delay excursions) and
   fringe jumps (tracking on a fringe other than the usual one, fringe-count
   changes, triangles whose paths do not close);
4. per science frame, the mean FT phasor <exp(-2 pi i (r_j - r_i) / lambda)>
   over the frame at every science wavelength: its argument references the
   science phase, its modulus is the frame's contrast loss;
5. the dual-field term D_ij = (w_j - w_i)(s_sc) - (w_j - w_i)(s_ft) + PATH_j - PATH_i
   from the pointings, the array geometry and the metrology.

The referenced coherent flux is C exp(+2 pi i D / lambda) conj(M) / |M|: its
phase is ``arg V_sc`` plus a zero-point per baseline and wavelength; its
amplitude still carries the contrast loss |M|, which the averaging divides out
in its normalisation (a ratio of sums, stable at low SNR).

Lengths in metres, times in seconds, phases in radians. Axes are named in
each docstring; ``n_ft`` FT frames, ``n_frame`` science frames, ``n_base``
baselines, ``n_ftw`` FT pixels, ``n_wave`` science wavelengths.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.ndimage import maximum_filter1d, median_filter

from ..geometry import uvw_from_enu
from .trig import cis, cos_sin

__all__ = ["FringeEstimates", "fringe_estimates", "track_opd", "FLAG_LOW_SNR", "FLAG_GD_EXCURSION",
           "FLAG_FRINGE_JUMP", "FLAG_CLOSURE", "flag_ft_frames", "frame_windows", "window_mean",
           "window_fraction", "mean_phasor", "chebyshev_interpolator", "dual_field_delay",
           "reference_coherent"]

FLAG_LOW_SNR = 1
"""FT frame flag: SNR below threshold (lock loss)."""
FLAG_GD_EXCURSION = 2
"""FT frame flag: group delay far from its usual value (lock loss)."""
FLAG_FRINGE_JUMP = 4
"""FT frame flag: tracking on another fringe, or the fringe count changes nearby."""
FLAG_CLOSURE = 8
"""FT frame flag: a triangle containing the baseline does not close by more than half a fringe."""


@dataclass(frozen=True)
class FringeEstimates:
    """Per-frame fringe-tracker estimates.

    Attributes
    ----------
    phase : ndarray, shape (n_ft, n_base), rad, in (-pi, pi], at wavenumber 1 / wave_ref
    group_delay : ndarray, shape (n_ft, n_base), m
    snr : ndarray, shape (n_ft, n_base), dimensionless
    wave_ref : float, m, 1 / mean wavenumber of the FT pixels
    """
    phase: np.ndarray
    group_delay: np.ndarray
    snr: np.ndarray
    wave_ref: float


def fringe_estimates(ft_coherent, ft_wave, *, ft_coherent_var,
                     n_refine: int = 2) -> FringeEstimates:
    """Group delay, phase and SNR of every FT frame and baseline.

    Parameters
    ----------
    ft_coherent : array_like, shape (n_ft, n_base, n_ftw), complex
        FT coherent fluxes (``extract`` product ``ft_coherent``).
    ft_wave : array_like, shape (n_ftw,), m, strictly monotonic
    ft_coherent_var : array_like, shape (n_ft, n_base, n_ftw), float
        Variance of each of Re C and Im C.
    n_refine : int
        Weighted least-squares refinements of the group delay after the coarse
        estimate from adjacent-pixel cross products.

    Non-finite coherent fluxes or variances (e.g. an FT pixel the combiner
    calibration could not model) are ignored: they enter no sum.

    Returns
    -------
    FringeEstimates
        The group delay is unambiguous within +-1 / (2 |d sigma|) of zero
        (d sigma the mean wavenumber step). SNR = |S| / sqrt(sum var), S the
        coherent flux summed over pixels after removing the group delay; for
        pure noise it is about 1.3 (Rayleigh mean).

    The per-pixel arithmetic is single precision (complex64, the extract product's own
    precision; phases to ~1e-6 rad, far below an FT frame's noise), the group delays
    and the outputs double.
    """
    c = np.asarray(ft_coherent).astype(np.complex64, copy=False)
    wave = np.asarray(ft_wave, float)
    var = np.asarray(ft_coherent_var).astype(np.float32, copy=False)
    if c.ndim != 3 or c.shape[-1] != wave.size or wave.size < 2:
        raise ValueError(f"ft_coherent must be (ft_frame, baseline, ft_wave) with ft_wave of "
                         f"length {wave.size} >= 2, found shape {c.shape}")
    if var.shape != c.shape:
        raise ValueError(f"ft_coherent_var shape {var.shape} differs from ft_coherent {c.shape}")
    sigma = 1.0 / wave
    if not (np.all(np.diff(sigma) > 0) or np.all(np.diff(sigma) < 0)):
        raise ValueError("ft_wave must be strictly monotonic")
    bad = ~(np.isfinite(c) & np.isfinite(var))
    if bad.any():                                  # NaN policy: such pixels get zero weight
        c, var = np.where(bad, 0, c), np.where(bad, 0.0, var)
    sigma0 = sigma.mean()
    # sums over the few FT pixels as matrix-vector products: numpy reduces a short
    # trailing axis row by row, three to four times slower
    ones_c, ones_f = np.ones(wave.size, np.complex64), np.ones(wave.size, np.float32)
    cross = (c[..., 1:] * np.conj(c[..., :-1])) @ ones_c[1:]
    gd = -np.angle(cross).astype(float) / (2 * np.pi * np.mean(np.diff(sigma)))
    weight = c.real ** 2 + c.imag ** 2
    # the weighted spread of the wavenumbers does not change with the group delay
    tiny = np.finfo(np.float32).tiny
    wsum = np.maximum(weight @ ones_f, tiny)
    dsig = (sigma - sigma0).astype(np.float32)
    ds = dsig - ((weight @ dsig) / wsum)[..., None]
    wds = weight * ds
    den = np.maximum((wds * ds) @ ones_f, tiny).astype(float)
    for _ in range(n_refine):
        rot = c * cis(2 * np.pi * sigma * gd[..., None], np.complex64)
        psi = np.angle(rot * np.conj(rot @ ones_c)[..., None])
        psi *= wds
        gd = gd - (psi @ ones_f) / (2 * np.pi * den)
    s = (c * cis(2 * np.pi * (sigma - sigma0) * gd[..., None], np.complex64)) @ ones_c
    noise = np.sqrt(np.maximum((var @ ones_f).astype(float), np.finfo(float).tiny))
    return FringeEstimates(phase=np.angle(s).astype(float), group_delay=gd,
                           snr=np.abs(s).astype(float) / noise, wave_ref=float(1.0 / sigma0))


def _running_median(a, window: int):
    """Running median over ``window`` frames of each column of a (n_frame, n_col) array,
    edges extended ("nearest"). One column at a time: scipy's 1-D median filter is ~6x
    faster than its N-D one with a (window, 1) footprint, and gives the same values."""
    a = np.asarray(a, float)
    return np.stack([median_filter(col, size=window, mode="nearest") for col in a.T], axis=1) \
        if a.shape[1] else a.copy()


def track_opd(phase, group_delay, *, wave_ref: float, window: int = 25) -> np.ndarray:
    """Residual path r_j - r_i of every FT frame from its phase and group delay.

    The phase is unwrapped in time; its whole number of fringes is the one that
    brings it closest to the group delay, both smoothed by a running median
    over ``window`` frames (the group delay is noisier than the phase but
    unambiguous). A constant fractional offset between the two (an
    instrumental phase) is measured over the exposure and left in place, so it
    cannot make the fringe count flicker.

    Parameters
    ----------
    phase : array_like, shape (n_ft, n_base), rad, at wavenumber 1 / wave_ref
    group_delay : array_like, shape (n_ft, n_base), m
    wave_ref : float, m
    window : int, frames (odd is best)

    Returns
    -------
    opd : ndarray, shape (n_ft, n_base), m, such that phase = -2 pi opd / wave_ref mod 2 pi
    """
    if window < 1:
        raise ValueError(f"window must be >= 1 frame, found {window}")
    opd_phase = -np.unwrap(np.asarray(phase, float), axis=0) * wave_ref / (2 * np.pi)
    offset = np.asarray(group_delay, float) - opd_phase
    smooth = _running_median(offset, window)
    # a constant group-delay/phase-delay offset (instrumental phase, dispersion) must not put
    # the rounding boundary where the data sit: centre it on the typical fractional fringe
    typical = np.nanmean(np.exp(2j * np.pi * offset / wave_ref), axis=0)
    frac = np.angle(typical) * wave_ref / (2 * np.pi)
    return opd_phase + np.rint((smooth - frac) / wave_ref) * wave_ref


def flag_ft_frames(snr, group_delay, opd, *, wave_ref: float, baselines, triangles,
                   snr_min: float = 3.0, max_group_delay: float = 5e-6, window: int = 25,
                   guard: int = 10) -> np.ndarray:
    """Flag FT frames affected by lock losses or fringe jumps.

    Parameters
    ----------
    snr, group_delay, opd : array_like, shape (n_ft, n_base); group_delay and opd in m
        (``opd`` from :func:`track_opd`)
    wave_ref : float, m
    baselines : sequence of (i, j), length n_base
    triangles : sequence of (i, j, k), i < j < k
    snr_min : float, lock-loss threshold on the FT SNR
    max_group_delay : float, m; a larger distance of the group delay from its
        median over the exposure is a lock loss
    window : int, frames of the running median used to find the fringe tracked
    guard : int, frames flagged on each side of a lock loss or fringe change
        (the tracker needs a few frames to re-lock)

    Returns
    -------
    flags : ndarray, shape (n_ft, n_base), uint8, OR of FLAG_* bits (0 = good)
    """
    snr = np.asarray(snr, float)
    gd = np.asarray(group_delay, float)
    opd = np.asarray(opd, float)
    flags = np.zeros(snr.shape, np.uint8)
    if snr.shape[0] == 0:
        return flags

    def widen(mask):
        return maximum_filter1d(mask.astype(np.uint8), size=2 * guard + 1, axis=0) > 0

    flags |= np.where(widen(~(snr >= snr_min)), FLAG_LOW_SNR, 0).astype(np.uint8)
    excursion = np.abs(gd - np.nanmedian(gd, axis=0)) > max_group_delay
    flags |= np.where(widen(excursion), FLAG_GD_EXCURSION, 0).astype(np.uint8)
    frac = np.angle(np.mean(np.exp(2j * np.pi * opd / wave_ref), axis=0)) * wave_ref / (2 * np.pi)
    fringe = np.rint((_running_median(opd, window) - frac) / wave_ref)
    usual = np.array([_mode(f) for f in fringe.T])
    change = np.zeros(fringe.shape, bool)
    change[1:] = fringe[1:] != fringe[:-1]
    jump = (fringe != usual) | widen(change)
    flags |= np.where(jump, FLAG_FRINGE_JUMP, 0).astype(np.uint8)
    base_index = {tuple(b): n for n, b in enumerate(baselines)}
    for i, j, k in triangles:
        bij, bjk, bik = base_index[(i, j)], base_index[(j, k)], base_index[(i, k)]
        closure = opd[:, bij] + opd[:, bjk] - opd[:, bik]
        bad = widen(np.abs(closure - np.median(closure)) > 0.5 * wave_ref)
        for b in (bij, bjk, bik):
            flags[:, b] |= np.where(bad, FLAG_CLOSURE, 0).astype(np.uint8)
    return flags


def _mode(values):
    vals, counts = np.unique(values, return_counts=True)
    return vals[np.argmax(counts)]


def frame_windows(sample_time, frame_start, frame_exp):
    """Index range of the samples inside each science frame.

    Parameters
    ----------
    sample_time : array_like, shape (n_sample,), s, increasing (e.g. FT frame mid-times)
    frame_start, frame_exp : array_like, shape (n_frame,), s

    Returns
    -------
    lo, hi : ndarray, shape (n_frame,), int; samples ``lo:hi`` satisfy
        start <= t < start + exp
    """
    t = np.asarray(sample_time, float)
    start = np.asarray(frame_start, float)
    return (np.searchsorted(t, start, side="left"),
            np.searchsorted(t, start + np.asarray(frame_exp, float), side="left"))


def _window_sum(values, lo, hi):
    cs = np.concatenate([np.zeros((1,) + values.shape[1:]), np.cumsum(values, axis=0)])
    return cs[hi] - cs[lo]


def window_fraction(mask, lo, hi):
    """Fraction of True samples of ``mask`` (n_sample, ...) inside each window.

    Returns an array (n_frame, ...); an empty window gives 1.0 (nothing to trust).
    """
    m = np.asarray(mask, bool).astype(float)
    n = (np.asarray(hi) - np.asarray(lo)).reshape((-1,) + (1,) * (m.ndim - 1))
    s = _window_sum(m, lo, hi)
    return np.where(n > 0, s / np.maximum(n, 1), 1.0)


def window_mean(values, sample_time, frame_start, frame_exp):
    """Mean of a sampled series over each science frame.

    Frames with no sample inside take the value linearly interpolated at their
    mid-time (the series is slow, e.g. metrology paths).

    Parameters
    ----------
    values : array_like, shape (n_sample, n_col)
    sample_time : array_like, shape (n_sample,), s, increasing
    frame_start, frame_exp : array_like, shape (n_frame,), s

    Returns
    -------
    ndarray, shape (n_frame, n_col)
    """
    v = np.asarray(values, float)
    t = np.asarray(sample_time, float)
    if v.ndim != 2 or v.shape[0] != t.size or t.size == 0:
        raise ValueError(f"values must be (sample, column) with {t.size} >= 1 samples, "
                         f"found shape {v.shape}")
    lo, hi = frame_windows(t, frame_start, frame_exp)
    n = (hi - lo)[:, None]
    mid = np.asarray(frame_start, float) + 0.5 * np.asarray(frame_exp, float)
    interp = np.stack([np.interp(mid, t, col) for col in v.T], axis=-1)
    return np.where(n > 0, _window_sum(v, lo, hi) / np.maximum(n, 1), interp)


def chebyshev_interpolator(x, n: int):
    """Chebyshev points of the first kind ``nodes`` (n,) on [-1, 1] and the
    barycentric interpolation matrix (n_x, n) from values at the nodes to ``x`` (n_x,)
    in [-1, 1] (Berrut & Trefethen 2004, SIAM Review 46, 501, eq. 5.3)."""
    j = np.arange(n)
    nodes = np.cos((2 * j + 1) * np.pi / (2 * n))
    bary = (-1.0) ** j * np.sin((2 * j + 1) * np.pi / (2 * n))
    d = np.asarray(x, float)[:, None] - nodes
    exact = d == 0
    m = bary / np.where(exact, 1.0, d)
    m /= m.sum(axis=1, keepdims=True)
    hit = exact.any(axis=1)
    m[hit] = exact[hit]
    return nodes, m


def _phasor_nodes(spread: float) -> int:
    """Chebyshev nodes that interpolate exp(i a x), |x| <= 1, to ~1e-13 for a <= spread:
    its Chebyshev coefficients are Bessel functions J_n(a), negligible beyond
    n ~ a + O(a^(1/3)) (checked numerically up to a = 300)."""
    return int(np.ceil(spread + 6 * np.cbrt(spread) + 10))


def mean_phasor(opd, lo, hi, wave, *, flux=None, baselines=None, block: int = 1024):
    """Mean phasor <exp(-2 pi i opd / lambda)> over each science frame.

    Parameters
    ----------
    opd : array_like, shape (n_ft, n_base), m (residual path r_j - r_i per FT frame)
    lo, hi : array_like, shape (n_frame,), int, FT frames of each science frame
        (:func:`frame_windows`)
    wave : array_like, shape (n_wave,), m, science wavelengths
    flux : array_like, shape (n_ft, n_tel), optional
        Per-telescope flux of every FT frame (any unit). When given, the phasor
        is weighted by the coupling of the frame, as a science frame integrates
        it: <sqrt(F_i F_j) exp(...)> / sqrt(<F_i> <F_j>); the modulus then also
        holds the loss of coherence by injection fluctuations within the frame
        (<sqrt(F_i F_j)> <= sqrt(<F_i><F_j>), Cauchy-Schwarz). Negative fluxes
        (noise) count as zero.
    baselines : sequence of (i, j), length n_base; needed with ``flux``
    block : int, FT frames summed at a time (memory ~ block * n_base * n_node * 16 bytes,
        n_node <= n_wave interpolation nodes)

    Returns
    -------
    phasor : ndarray, shape (n_frame, n_base, n_wave), complex128; NaN for a
        frame without FT samples. ``abs(phasor)`` is the contrast loss, its
        argument the mean FT phase scaled to each wavelength
        ((lambda_ft / lambda) phi_ft, phi_ft unwrapped in time).
    """
    opd = np.asarray(opd, float)
    k = -2 * np.pi / np.asarray(wave, float)
    out = np.full((len(lo), opd.shape[1], k.size), np.nan + 0j)
    if block < 1:
        raise ValueError(f"block must be >= 1, found {block}")
    if flux is not None:
        if baselines is None:
            raise ValueError("mean_phasor: flux weighting needs the baselines (i, j)")
        f = np.maximum(np.asarray(flux, float), 0.0)
        b = np.asarray(baselines, int)
        if f.ndim != 2 or f.shape[0] != opd.shape[0] or len(b) != opd.shape[1]:
            raise ValueError(f"flux must be (ft_frame, telescope) with {opd.shape[0]} frames "
                             f"and baselines {opd.shape[1]} pairs; found {f.shape}, {len(b)}")
        amp = np.sqrt(f[:, b[:, 0]] * f[:, b[:, 1]])                  # (n_ft, n_base)
    # The sum over FT frames, S(k) = sum_t w_t exp(i k opd_t), is an entire function of
    # the wavenumber k whose "frequency" is the spread of opd within the frame, a few
    # microns at most against a band of k only ~0.7 rad/um wide. It is evaluated at a
    # few Chebyshev nodes of the band (about 15 instead of every science wavelength)
    # and interpolated (barycentric, exact to ~1e-13; Trefethen 2013, Approximation
    # Theory and Approximation Practice, SIAM, ch. 5 and 8); the cosines and sines are
    # float32-evaluated (numerics/trig.py, 3e-7 absolute). Where the spread would
    # need as many nodes as there are wavelengths, the wavelengths themselves are used.
    k_mid, k_half = 0.5 * (k.max() + k.min()), max(0.5 * (k.max() - k.min()), 1e-300)
    x = (k - k_mid) / k_half
    interpolators = {}
    weight = np.ones(opd.shape) if flux is None else amp                # (n_ft, n_base)
    for n, (a, e) in enumerate(zip(lo, hi)):       # loop over science frames only
        if e <= a:
            continue
        seg = opd[a:e]
        centre = 0.5 * (seg.max(axis=0) + seg.min(axis=0))               # (n_base,)
        spread = k_half * 0.5 * float((seg.max(axis=0) - seg.min(axis=0)).max())
        if not np.isfinite(spread):             # NaN paths: direct sum (NaN phasor)
            centre, spread = np.zeros_like(centre), np.inf
        n_node = _phasor_nodes(spread)
        interp = None
        if n_node < k.size:
            if n_node not in interpolators:
                interpolators[n_node] = chebyshev_interpolator(x, n_node)
            nodes, interp = interpolators[n_node]
        k_nodes = k if interp is None else k_mid + k_half * nodes
        acc = np.zeros((opd.shape[1], k_nodes.size), complex)
        for c in range(a, e, block):
            c1 = min(e, c + block)
            ph = (opd[c:c1] - centre)[:, :, None] * k_nodes              # (t, base, node)
            w = weight[c:c1].T[:, None, :]                               # (base, 1, t)
            cos, sin = cos_sin(ph)
            acc += (w @ cos.transpose(1, 0, 2))[:, 0]
            acc += 1j * (w @ sin.transpose(1, 0, 2))[:, 0]
        if interp is not None:
            acc = acc @ interp.T                                         # (base, wave)
        acc *= np.exp(1j * centre[:, None] * k)
        if flux is None:
            out[n] = acc / (e - a)
        else:
            fm = f[a:e].mean(axis=0)
            norm = (e - a) * np.sqrt(fm[b[:, 0]] * fm[b[:, 1]])
            with np.errstate(invalid="ignore", divide="ignore"):
                out[n] = np.where(norm[:, None] > 0, acc / norm[:, None], np.nan)
    return out


def dual_field_delay(hour_angle_sc, hour_angle_ft, metrology_path, *, dec_sc_rad: float,
                     dec_ft_rad: float, station_enu_m, latitude_rad: float, baselines):
    """D_ij = (w_j - w_i)(s_sc) - (w_j - w_i)(s_ft) + PATH_j - PATH_i per time.

    Parameters
    ----------
    hour_angle_sc, hour_angle_ft : array_like, shape (n_time,), rad, of the
        science and fringe-tracker pointings
    metrology_path : array_like, shape (n_time, n_tel), m
    dec_sc_rad, dec_ft_rad : float, rad
    station_enu_m : array_like, shape (n_tel, 3), m (East, North, Up)
    latitude_rad : float
    baselines : sequence of (i, j), length n_base

    Returns
    -------
    delay : ndarray, shape (n_time, n_base), m

    Notes
    -----
    w_i = P_i . s is the ``w`` coordinate of the station vector
    (``pipeline.geometry.uvw_from_enu``, Thompson, Moran & Swenson ch. 4).
    """
    p = np.asarray(station_enu_m, float)
    w_sc = uvw_from_enu(p, hour_angle_sc, dec_sc_rad, latitude_rad)[..., 2]
    w_ft = uvw_from_enu(p, hour_angle_ft, dec_ft_rad, latitude_rad)[..., 2]
    per_tel = w_sc - w_ft + np.asarray(metrology_path, float)
    b = np.asarray(baselines, int)
    return per_tel[:, b[:, 1]] - per_tel[:, b[:, 0]]


def reference_coherent(coherent, phasor, delay, wave):
    """Reference science coherent fluxes on the FT and the dual-field delay.

    Parameters
    ----------
    coherent : array_like, shape (n_frame, n_pol, n_base, n_wave), complex
    phasor : array_like, shape (n_frame, n_base, n_wave), complex (:func:`mean_phasor`)
    delay : array_like, shape (n_frame, n_base), m (:func:`dual_field_delay`)
    wave : array_like, shape (n_wave,), m

    Returns
    -------
    ndarray, shape of ``coherent``, complex128:
        coherent * exp(+2 pi i delay / lambda) * conj(phasor) / |phasor|;
        NaN where the phasor is zero or NaN. The amplitude is unchanged.
    """
    m = np.asarray(phasor, complex)
    a = np.abs(m)
    with np.errstate(invalid="ignore", divide="ignore"):
        unit = np.where(a > 0, np.conj(m) / a, np.nan)
    rot = unit * np.exp(2j * np.pi * np.asarray(delay, float)[..., None] / np.asarray(wave, float))
    return np.asarray(coherent, complex) * rot[:, None]
