# SPDX-License-Identifier: BSD-3-Clause
"""The combiner's output per pixel, integrated over each pixel's bandpass.

Per output k (pair i, j) and wavelength (DEVELOPERS.md conventions):
I_k = t_ki F_i + t_kj F_j + 2 sqrt(t_ki t_kj) c_k (Re C_ij cos theta_k - Im C_ij sin theta_k),
then summed over the ``sub`` samples of the pixel's bandpass with weights in metres,
which turns spectral densities (per metre) into counts per pixel.
"""

from __future__ import annotations

import numpy as np

from .truth_instrument import Channel

__all__ = ["detected"]


def detected(ch: Channel, flux_i, flux_j, coherent) -> np.ndarray:
    """Detected photo-electrons per pixel.

    Parameters
    ----------
    ch : Channel
    flux_i, flux_j : ndarray, broadcastable to (frame, trace, pix, sub)
        Photon density of telescope i (resp. j) of each trace's pair, per metre.
    coherent : ndarray complex, broadcastable to (frame, trace, pix, sub), per metre.

    Returns
    -------
    counts : ndarray, shape (frame, trace, pix)
    """
    ti, tj = ch.t_fine[:, 0], ch.t_fine[:, 1]
    amp = 2 * np.sqrt(ti * tj) * ch.c_fine
    fringe = amp * (coherent.real * np.cos(ch.theta_fine) - coherent.imag * np.sin(ch.theta_fine))
    i_k = ti * flux_i + tj * flux_j + fringe
    return np.einsum("ftps,tps->ftp", i_k, ch.fine_weight)

