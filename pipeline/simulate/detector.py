# SPDX-License-Identifier: BSD-3-Clause
"""Detectors of the night: fixed pattern (bias, pixel response, hot and dead pixels) and
the read-out of one batch of frames (Poisson photons and dark current, cosmic rays,
Gaussian read noise, gain, 16-bit quantisation and saturation)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import erf

__all__ = ["DetectorState", "make_detector", "read_out", "trace_profiles"]


@dataclass(frozen=True)
class DetectorState:
    """Fixed pattern of one detector for the night; arrays of the detector's pixel shape."""
    name: str
    gain: float              # e-/ADU
    read_noise: float        # e-
    saturation: int          # ADU
    bias: np.ndarray         # ADU
    response: np.ndarray     # pixel response (flat field), 0 on dead pixels
    dark: np.ndarray         # e-/s, hot pixels included
    hot: np.ndarray          # bool
    dead: np.ndarray         # bool
    cosmic_rate: float       # events per pixel per second
    cosmic_e: float          # mean deposit per event, e-


def make_detector(det, shape, rng, *, response_rms: float, bias_pattern: float,
                  hot_dark, cosmic_e: float) -> DetectorState:
    """Draw the fixed pattern of detector ``det`` (an instrument ``Detector``)."""
    n = int(np.prod(shape))
    response = 1 + response_rms * rng.standard_normal(shape)
    bias = det.bias_adu + bias_pattern * rng.standard_normal(shape)
    flat_idx = rng.permutation(n)
    n_hot = int(round(det.hot_pixel_fraction * n))
    n_dead = int(round(det.dead_pixel_fraction * n))
    hot = np.zeros(n, bool)
    hot[flat_idx[:n_hot]] = True
    dead = np.zeros(n, bool)
    dead[flat_idx[n_hot:n_hot + n_dead]] = True
    hot, dead = hot.reshape(shape), dead.reshape(shape)
    dark = np.full(shape, det.dark_current_e_per_s)
    dark[hot] = rng.uniform(hot_dark[0], hot_dark[1], n_hot)
    response[dead] = 0.0
    return DetectorState(det.name, det.gain_e_per_adu, det.read_noise_e, det.saturation_adu,
                         bias, response, dark, hot, dead, det.cosmic_rate_per_px_s, cosmic_e)


def read_out(state: DetectorState, photons, dit: float, rng, *, window=None):
    """Turn expected photo-electrons per frame into raw 16-bit frames.

    Parameters
    ----------
    photons : ndarray, shape (frame, *pixel_shape), expected photo-electrons per frame
        before the pixel response
    dit : float, s, integration of one frame
    window : tuple of slices into the detector's fixed pattern (default: all of it)

    Returns
    -------
    raw : ndarray uint16, same shape, ADU; also the list of cosmic-ray hits
        (frame, *pixel index) that landed in the window.
    """
    w = window if window is not None else tuple(slice(None) for _ in state.bias.shape)
    resp, dark, bias = state.response[w], state.dark[w], state.bias[w]
    mean = np.asarray(photons, float) * resp + dark * dit
    e = rng.poisson(np.maximum(mean, 0.0)).astype(np.float64)
    hits = []
    n_cr = rng.poisson(state.cosmic_rate * dit * e.size)
    if n_cr:
        idx = rng.integers(0, e.size, n_cr)
        dep = rng.exponential(state.cosmic_e, n_cr)
        e.reshape(-1)[idx] += dep
        hits = [list(map(int, np.unravel_index(i, e.shape))) for i in idx]
    e += state.read_noise * rng.standard_normal(e.shape)
    adu = np.rint(bias + e / state.gain)
    return np.clip(adu, 0, min(state.saturation, 65535)).astype(np.uint16), hits


def trace_profiles(trace_y, trace_sigma, n_y: int) -> np.ndarray:
    """Fraction of each trace's flux falling in each pixel row.

    Gaussian cross-profile integrated over the pixel (rows centred on integer y).

    Parameters
    ----------
    trace_y, trace_sigma : ndarray, shape (trace, x), px

    Returns
    -------
    profile : ndarray, shape (trace, y, x)
    """
    edges = np.arange(n_y + 1, dtype=float)[None, :, None] - 0.5
    z = (edges - trace_y[:, None, :]) / (np.sqrt(2) * trace_sigma[:, None, :])
    cdf = 0.5 * (1 + erf(z))
    return np.diff(cdf, axis=1)
