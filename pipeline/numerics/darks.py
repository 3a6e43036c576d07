# SPDX-License-Identifier: BSD-3-Clause
"""Master dark, temporal-noise map and bad-pixel masks from a stack of dark frames.

The stack is streamed: callers pass a function returning a fresh iterator over
chunks of frames (numpy arrays of shape (n_frame_chunk, *pixel_shape)), so
memory stays bounded by one chunk whatever the number of frames. The same
kernels serve the science detector (pixel axes (y, x)) and the fringe-tracker
channel (pixel axes (output, ft_wave)).

Method: robust first passes (per-chunk median, combined by the median over
chunks; then the median absolute deviation about it) followed by a kappa-sigma clipped mean about that centre (the
classical sigma-clipping estimator; e.g. Stetson 1987, PASP 99, 191 for its use
on CCD stacks). The per-pixel temporal noise comes from differences of
consecutive frames, which cancel the fixed pattern (bias and dark level) and
leave sqrt(2) times the per-frame noise (Janesick 2001, *Scientific
Charge-Coupled Devices*, SPIE, photon-transfer method).

Mask and NaN policy: non-finite input values are never part of any sum; a
pixel with no finite sample is NaN in ``master`` and ``read_noise`` and
invalid in ``valid``.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Callable, Iterable

import numpy as np

__all__ = ["DarkResult", "robust_centre", "robust_scale", "clipped_stack", "difference_noise",
           "bad_pixel_masks", "master_dark"]

_MAD_TO_SIGMA = 1.482602218505602  # 1 / Phi^-1(3/4), Gaussian consistency of the MAD

_MIN_PAIRS_QUIET = 8
ChunkSource = Callable[[], Iterable[np.ndarray]]


def _nanmedian(a, axis=None):
    """np.nanmedian without the all-NaN warning (such pixels are NaN by policy)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmedian(a, axis=axis)


@dataclass(frozen=True)
class DarkResult:
    """What :func:`master_dark` returns.

    Attributes
    ----------
    master : ndarray, shape pixel_shape, float64, ADU
        Clipped mean of the dark frames (bias included).
    read_noise : ndarray, shape pixel_shape, float64, ADU
        Temporal noise of one frame (read noise plus the dark shot noise at this
        integration time), from consecutive-frame differences.
    dark_rate : ndarray, shape pixel_shape, float64, ADU/s
        ``(master - median(master)) / dit``: dark signal in excess of the detector's
        typical level (the bias is not separable from the dark at one DIT).
    hot, dead, noisy : ndarray, shape pixel_shape, bool
        Pixel classes (see :func:`bad_pixel_masks`).
    valid : ndarray, shape pixel_shape, bool
        True where the pixel is usable.
    n_frame : int
        Frames read.
    n_clipped : int
        Samples rejected by the clipping (cosmic rays, glitches).
    """
    master: np.ndarray
    read_noise: np.ndarray
    dark_rate: np.ndarray
    hot: np.ndarray
    dead: np.ndarray
    noisy: np.ndarray
    valid: np.ndarray
    n_frame: int
    n_clipped: int


def robust_centre(chunks: Iterable[np.ndarray]) -> tuple[np.ndarray, int]:
    """Robust per-pixel centre of a frame stack, one chunk at a time.

    Parameters
    ----------
    chunks : iterable of ndarray, each shape (n_frame_chunk, *pixel_shape), ADU

    Returns
    -------
    centre : ndarray, shape pixel_shape, float64, ADU
        Median over chunks of the per-chunk median (NaN samples ignored).
    n_frame : int
    """
    medians, n_frame = [], 0
    for chunk in chunks:
        chunk = np.asarray(chunk, dtype=np.float64)
        if chunk.shape[0] == 0:
            continue
        n_frame += chunk.shape[0]
        medians.append(_nanmedian(chunk, axis=0))
    if n_frame == 0:
        raise ValueError("robust_centre: no frames")
    return _nanmedian(np.stack(medians), axis=0), n_frame


def robust_scale(chunks: Iterable[np.ndarray], centre: np.ndarray) -> np.ndarray:
    """Robust per-pixel scatter about a known centre, one chunk at a time.

    The median absolute deviation from ``centre`` (fixed, so small chunks add
    little bias), per chunk, median over chunks, scaled to a Gaussian sigma; at
    least the median of that over pixels (a pixel's own estimate from few
    frames is noisy, and must not clip ordinary samples).

    Returns
    -------
    scale : ndarray, shape pixel_shape, float64, ADU
    """
    mads = [_nanmedian(np.abs(np.asarray(c, dtype=np.float64) - centre), axis=0)
            for c in chunks if len(c)]
    scale = _MAD_TO_SIGMA * (_nanmedian(np.stack(mads), axis=0) if len(mads) > 1 else mads[0])
    return np.fmax(scale, _nanmedian(scale))


def clipped_stack(chunks: Iterable[np.ndarray], centre: np.ndarray, scale: np.ndarray, *,
                  kappa: float = 5.0, scale_floor: float = 0.5
                  ) -> tuple[np.ndarray, np.ndarray, int]:
    """Kappa-sigma clipped mean about a known centre, accumulated over chunks.

    Parameters
    ----------
    chunks : iterable of ndarray, each shape (n_frame_chunk, *pixel_shape), ADU
    centre, scale : ndarray, shape pixel_shape, ADU
        From :func:`robust_centre` and :func:`robust_scale`. Where ``scale`` is
        NaN nothing is clipped.
    kappa : float
        Rejection threshold in units of ``scale``.
    scale_floor : float, ADU
        Lower bound of ``scale`` (quantisation: integer ADU make the MAD zero
        for very quiet pixels).

    Returns
    -------
    mean : ndarray, shape pixel_shape, float64, ADU (NaN where no sample kept)
    count : ndarray, shape pixel_shape, int64, samples kept
    n_clipped : int, samples rejected
    """
    if kappa <= 0:
        raise ValueError(f"kappa must be positive, found {kappa}")
    limit = kappa * np.fmax(scale, scale_floor)
    limit = np.where(np.isnan(scale), np.inf, limit)
    total = np.zeros(centre.shape)
    count = np.zeros(centre.shape, dtype=np.int64)
    n_clipped = 0
    for chunk in chunks:
        chunk = np.asarray(chunk, dtype=np.float64)
        finite = np.isfinite(chunk)
        keep = finite & (np.abs(chunk - centre) <= limit)
        n_clipped += int(np.count_nonzero(finite & ~keep))
        total += np.where(keep, chunk, 0.0).sum(axis=0)
        count += keep.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(count > 0, total / np.maximum(count, 1), np.nan)
    return mean, count, n_clipped


def difference_noise(chunks: Iterable[np.ndarray], scale: np.ndarray, *,
                     kappa: float = 5.0, scale_floor: float = 0.5) -> np.ndarray:
    """Per-pixel temporal noise of one frame from consecutive-frame differences.

    Frames are paired within each chunk (0-1, 2-3, ...); a pair whose difference
    exceeds ``kappa * sqrt(2) * scale`` (a cosmic ray in one frame) is rejected.

    Parameters
    ----------
    chunks : iterable of ndarray, each shape (n_frame_chunk, *pixel_shape), ADU
    scale : ndarray, shape pixel_shape, ADU, robust per-frame scatter

    Returns
    -------
    noise : ndarray, shape pixel_shape, float64, ADU
        ``sqrt(mean(d**2) / 2)`` over kept pairs; NaN with no pair.
    n_pair : ndarray, shape pixel_shape, int64, pairs kept
    """
    limit = kappa * np.sqrt(2.0) * np.fmax(scale, scale_floor)
    limit = np.where(np.isnan(scale), np.inf, limit)
    sumsq, count = None, None
    for chunk in chunks:
        chunk = np.asarray(chunk, dtype=np.float64)
        n_pair = chunk.shape[0] // 2
        if sumsq is None:
            sumsq = np.zeros(chunk.shape[1:])
            count = np.zeros(chunk.shape[1:], dtype=np.int64)
        if n_pair == 0:
            continue
        d = chunk[1:2 * n_pair:2] - chunk[0:2 * n_pair:2]
        keep = np.isfinite(d) & (np.abs(d) <= limit)
        sumsq += np.where(keep, d * d, 0.0).sum(axis=0)
        count += keep.sum(axis=0)
    if sumsq is None:
        raise ValueError("difference_noise: no frames")
    with np.errstate(invalid="ignore", divide="ignore"):
        noise = np.where(count > 0, np.sqrt(sumsq / np.maximum(count, 1) / 2.0), np.nan)
    return noise, count


def bad_pixel_masks(master: np.ndarray, noise: np.ndarray, n_pair: np.ndarray, *, dit: float,
                    hot_rate: float, hot_sigma: float, low_level: float, noisy_factor: float,
                    quiet_factor: float, false_alarm: float) -> tuple[np.ndarray, ...]:
    """Classify pixels from the master dark and the noise map.

    Parameters
    ----------
    master, noise : ndarray, shape pixel_shape, ADU
    n_pair : ndarray or int, frame pairs behind each noise estimate
    dit : float, s, integration of one dark frame
    hot_rate : float, ADU/s
        Hot: dark rate above the typical level by more than this ...
    hot_sigma : float
        ... and an excess above the typical level larger than ``hot_sigma`` times
        the robust spatial scatter of the master (bias pattern plus the noise of
        the mean), so that an excess too small to measure at this DIT is not flagged.
    low_level : float, ADU
        Dead: master below the typical level by more than this (a pixel stuck low).
    noisy_factor, quiet_factor : float
        Noisy (dead): temporal noise above ``noisy_factor`` (below ``quiet_factor``)
        times the median noise, and beyond what ``n_pair`` pairs give by chance
        with probability ``false_alarm`` (chi-square with ``n_pair`` degrees of
        freedom for the sum of squared Gaussian differences). The quiet test
        needs at least 8 pairs: with fewer, integer ADU make a zero noise
        estimate too likely.
    false_alarm : float, per-pixel probability of flagging an ordinary pixel

    Returns
    -------
    dark_rate : ndarray, float64, ADU/s
    hot, dead, noisy, valid : ndarray of bool (valid: True = usable)

    Notes
    -----
    A pixel with no response (dead to light) but normal bias and noise cannot be
    seen in darks; the flat-field stage finds those.
    """
    from scipy.stats import chi2
    if dit <= 0:
        raise ValueError(f"dit must be positive, found {dit}")
    finite = np.isfinite(master) & np.isfinite(noise)
    level = _nanmedian(master[finite]) if finite.any() else np.nan
    typical_noise = _nanmedian(noise[finite]) if finite.any() else np.nan
    spread = _MAD_TO_SIGMA * _nanmedian(np.abs(master[finite] - level)) if finite.any() else 0.0
    dark_rate = (master - level) / dit
    k = np.maximum(np.broadcast_to(n_pair, master.shape), 1)
    # The quantiles depend only on the pair count, which takes few values: inverting the
    # chi-square distribution per pixel cost ~10 s on a 4-Mpixel window.
    k_values, k_index = np.unique(k, return_inverse=True)
    low = np.minimum(quiet_factor, np.sqrt(chi2.ppf(false_alarm, k_values) / k_values))
    # Integer ADU: with few pairs, identical frames (noise exactly 0) happen by chance.
    low = np.where(k_values >= _MIN_PAIRS_QUIET, low, 0.0)[k_index].reshape(k.shape)
    high = np.maximum(noisy_factor, np.sqrt(chi2.isf(false_alarm, k_values) / k_values))
    high = high[k_index].reshape(k.shape)
    with np.errstate(invalid="ignore"):
        hot = finite & (dark_rate > hot_rate) & (master - level > hot_sigma * spread)
        dead = finite & ((master < level - low_level) | (noise < low * typical_noise))
        noisy = finite & ~hot & ~dead & (noise > high * typical_noise)
    valid = finite & ~hot & ~dead & ~noisy
    return dark_rate, hot, dead, noisy, valid


def master_dark(source: ChunkSource, *, dit: float, kappa: float = 5.0,
                hot_rate: float = 20.0, hot_sigma: float = 5.0, low_level: float = 100.0,
                noisy_factor: float = 5.0, quiet_factor: float = 0.2,
                false_alarm: float = 1e-6, scale_floor: float = 0.5) -> DarkResult:
    """Master dark, noise map and masks from a stack streamed in chunks (four passes).

    Parameters
    ----------
    source : callable returning an iterator of ndarray (n_frame_chunk, *pixel_shape), ADU
        Called once per pass; each call must yield the same frames in the same order.
    dit : float, s
    kappa, hot_rate, hot_sigma, low_level, noisy_factor, quiet_factor, false_alarm, scale_floor
        See :func:`clipped_stack` and :func:`bad_pixel_masks`.

    Returns
    -------
    DarkResult
    """
    centre, n_frame = robust_centre(source())
    scale = robust_scale(source(), centre)
    master, _, n_clipped = clipped_stack(source(), centre, scale, kappa=kappa,
                                         scale_floor=scale_floor)
    if n_frame < 2:
        raise ValueError(f"a noise map needs at least 2 dark frames, found {n_frame}")
    noise, n_pair = difference_noise(source(), scale, kappa=kappa, scale_floor=scale_floor)
    dark_rate, hot, dead, noisy, valid = bad_pixel_masks(
        master, noise, n_pair, dit=dit, hot_rate=hot_rate, hot_sigma=hot_sigma,
        low_level=low_level, noisy_factor=noisy_factor, quiet_factor=quiet_factor,
        false_alarm=false_alarm)
    return DarkResult(master=master, read_noise=noise, dark_rate=dark_rate, hot=hot, dead=dead,
                      noisy=noisy, valid=valid, n_frame=n_frame, n_clipped=n_clipped)

