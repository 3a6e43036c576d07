# SPDX-License-Identifier: BSD-3-Clause
"""Gaussian realisations of observables with a given covariance between channels.

Used as a parametric bootstrap of the binary fit when the calibrated product holds
the frame-bootstrap covariance between wavelengths but not the realisations
themselves. A realisation is value + L z with z standard normal and L L^T the
covariance: L is the Cholesky factor when every block is positive definite, else
from the eigen-decomposition, which tolerates the semi-definite covariances a
finite bootstrap can give (e.g. Gentle 2003, Random Number Generation and Monte
Carlo Methods, section 5.3).
"""

from __future__ import annotations

import numpy as np

__all__ = ["draw_correlated"]


def draw_correlated(value, err, cov=None, *, n: int, seed: int = 0):
    """Gaussian realisations of observables about ``value``.

    Parameters
    ----------
    value, err : ndarray, shape (..., n_wave)
    cov : ndarray, shape (..., n_wave, n_wave), or None (independent channels, ``err``)
        Covariance between channels (e.g. from a bootstrap over frames).
    n : int, number of realisations
    seed : int

    Returns
    -------
    draws : ndarray, shape (n, ..., n_wave); NaN where ``value`` or ``err`` is NaN

    Notes
    -----
    Cholesky factors of the covariance blocks (a few times cheaper than an
    eigen-decomposition); if any block is not positive definite (a bootstrap covariance
    is only positive semi-definite), the square root from the eigen-decomposition with
    negative eigenvalues clipped. NaN rows are treated as independent with the
    diagonal error.
    """
    rng = np.random.default_rng(seed)
    value, err = np.asarray(value, float), np.asarray(err, float)
    z = rng.standard_normal((n,) + value.shape)
    if cov is None:
        return value + z * err
    c = np.asarray(cov, float)
    ok = np.isfinite(c).all(-1) & np.isfinite(c).all(-2)
    c = np.where(ok[..., :, None] & ok[..., None, :], c, 0.0)
    c = c + np.eye(c.shape[-1]) * np.where(ok, 0.0, np.nan_to_num(err) ** 2)[..., None]
    c = 0.5 * (c + np.swapaxes(c, -1, -2))
    try:
        root = np.linalg.cholesky(c)
    except np.linalg.LinAlgError:
        vals, vecs = np.linalg.eigh(c)
        root = vecs * np.sqrt(np.clip(vals, 0, None))[..., None, :]
    return value + np.einsum("...ij,n...j->n...i", root, z)
