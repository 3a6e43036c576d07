# SPDX-License-Identifier: BSD-3-Clause
"""The combiner's visibility-to-pixel model (V2PM) and its noise-weighted inverse (P2VM).

Per polarisation, wavelength and output k of baseline (i, j) (DEVELOPERS.md):

    I_k = sum_i t_ki F_i + 2 sqrt(t_ki t_kj) c_k (Re C_ij cos theta_k - Im C_ij sin theta_k)

is linear in the 16 real unknowns ``F_0..F_3, Re C_01..Re C_23, Im C_01..Im C_23``.
The V2PM is that 24 x 16 matrix, calibrated on lamp frames: transmissions
``t_ki`` from single-beam exposures, contrast ``c_k`` and phase shift
``theta_k`` from the delay scan. The P2VM is its weighted least-squares
pseudo-inverse ``(M^T W M)^-1 M^T W`` with ``W`` the inverse noise variance of the
outputs (Tatulli et al. 2007, A&A 464, 29).

Normalisation: ``t_ki`` is the share of telescope i's flux reaching output k
(``sum_k t_ki = 1`` per polarisation and wavelength), so ``F_i`` is telescope
i's flux summed over all outputs, and ``C_ij = sqrt(F_i F_j) V_ij``.

Axes: ``(pol, output, telescope, wave)`` for transmissions, ``(pol, output, wave)``
for contrasts and phases (rad), ``(pol, wave, output, unknown)`` for the V2PM and
``(pol, wave, unknown, output)`` for the P2VM. NaN policy: NaN inputs propagate
to NaN in the matrices of the affected (pol, wave); nothing is dropped silently.
"""

from __future__ import annotations

import numpy as np

__all__ = ["N_UNKNOWN", "transmissions", "smooth_transmissions", "contrast_and_phase",
           "build_v2pm", "weighted_pinv",
           "condition_number", "model_residuals", "phase_set_qc", "output_noise_weights"]

N_UNKNOWN = 16


def transmissions(beam_flux):
    """Per-output share of each telescope's flux from single-beam lamp frames.

    Parameters
    ----------
    beam_flux : array_like, shape (telescope, pol, output, wave)
        Mean flux of each output with only telescope i lit (any unit, dark subtracted).

    Returns
    -------
    t : ndarray, shape (pol, output, telescope, wave), dimensionless; sums to 1 over output
    """
    b = np.asarray(beam_flux, float)
    if b.ndim != 4:
        raise ValueError(f"beam_flux must be (telescope, pol, output, wave), found {b.shape}")
    total = b.sum(axis=2, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        t = b / total
    return t.transpose(1, 2, 0, 3)


def smooth_transmissions(t, wave, *, deg: int, weight=None):
    """Low-order polynomial in wavelength through each output's measured share.

    The shares of a combiner are smooth functions of wavelength (its optics have no
    spectral structure on the scale of a few channels), while the per-channel
    measurement from short single-beam lamp frames carries photon noise. A
    weighted least-squares polynomial of degree ``deg`` in scaled wavelength per
    (pol, output, telescope) keeps the chromatic trend and averages the noise over
    the band; the result is renormalised so the shares still sum to 1 over outputs.

    Parameters
    ----------
    t : array_like, shape (pol, output, telescope, wave)
        Measured shares (see :func:`transmissions`); NaN channels are left out of the fit.
    wave : array_like, shape (wave,), m
    deg : int -- polynomial degree (>= 0)
    weight : array_like, broadcastable to ``t``, optional
        Inverse standard deviation of each share (default: uniform).

    Returns
    -------
    ndarray, shape of ``t``: smoothed shares. A NaN channel is filled by the polynomial;
    a column with no more than ``deg`` finite channels is NaN (and so, through the
    renormalisation, is its telescope's share in every output).
    """
    if deg < 0:
        raise ValueError(f"transmission smoothing degree must be >= 0, found {deg}")
    t = np.asarray(t, float)
    x = np.asarray(wave, float)
    x = 2 * (x - x.mean()) / max(np.ptp(x), 1e-300)                   # -1 .. 1
    w = np.broadcast_to(np.ones(1) if weight is None else np.asarray(weight, float), t.shape)
    ok = np.isfinite(t) & np.isfinite(w) & (w > 0)
    enough = ok.sum(-1) > deg                                        # (pol, output, telescope)
    vander = np.vander(x, deg + 1, increasing=True)                  # (wave, coef)
    ww = np.where(ok, w, 0.0) ** 2
    lhs = np.einsum("...w,wi,wj->...ij", ww, vander, vander)
    lhs = np.where(enough[..., None, None], lhs, np.eye(deg + 1))
    rhs = np.einsum("...w,wi,...w->...i", ww, vander, np.where(ok, t, 0.0))
    coef = np.linalg.solve(lhs, rhs[..., None])[..., 0]
    smooth = np.where(enough[..., None], np.einsum("...i,wi->...w", coef, vander), np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        return smooth / smooth.sum(axis=1, keepdims=True)


def contrast_and_phase(fringe, incoherent, t, pairs):
    """Instrumental contrast and phase shift of every output from a lamp delay scan.

    Parameters
    ----------
    fringe : array_like complex, shape (pol, output, wave)
        Fringe phasor ``Z_k`` at the envelope peak: the scan signal of output k is
        ``A_k + env Re[Z_k exp(-2 pi i opd / lambda)]`` with opd = PATH_j - PATH_i
        (``pipeline.numerics.wavelength.fringe_phasor``). Lamp visibility taken as 1.
    incoherent : array_like, shape (pol, output, wave) -- ``A_k``, the mean flux
    t : array_like, shape (pol, output, telescope, wave) -- transmissions
    pairs : array_like of int, shape (output, 2) -- telescopes (i, j) of each output

    Returns
    -------
    contrast : ndarray (pol, output, wave)
    phase : ndarray (pol, output, wave), rad, in (-pi, pi]
    lamp_flux : ndarray (pol, telescope, wave) -- F_i of the scan, least squares over outputs
    """
    z = np.asarray(fringe, complex)
    a = np.asarray(incoherent, float)
    t = np.asarray(t, float)
    pairs = np.asarray(pairs, int)
    # A_k = sum_i t_ki F_i: per (pol, wave) a 24 x 4 least-squares problem
    m = t.transpose(0, 3, 1, 2)                                         # (pol, wave, out, tel)
    rhs = a.transpose(0, 2, 1)[..., None]                               # (pol, wave, out, 1)
    bad = ~(np.isfinite(m).all(axis=(-1, -2)) & np.isfinite(rhs).all(axis=(-1, -2)))
    flux = (np.linalg.pinv(np.where(bad[..., None, None], 0.0, m))
            @ np.where(bad[..., None, None], 0.0, rhs))[..., 0]
    flux = np.where(bad[..., None], np.nan, flux).transpose(0, 2, 1)   # (pol, tel, wave)
    n_out = pairs.shape[0]
    o = np.arange(n_out)
    ti, tj = t[:, o, pairs[:, 0]], t[:, o, pairs[:, 1]]                 # (pol, out, wave)
    fi, fj = flux[:, pairs[:, 0]], flux[:, pairs[:, 1]]
    with np.errstate(invalid="ignore"):
        contrast = np.abs(z) / (2 * np.sqrt(ti * tj * fi * fj))
    return contrast, np.angle(z), flux


def build_v2pm(t, contrast, phase, pairs, *, n_baseline: int = 6):
    """The visibility-to-pixel matrix.

    Parameters
    ----------
    t : array_like, shape (pol, output, telescope, wave)
    contrast, phase : array_like, shape (pol, output, wave); phase in rad
    pairs : array_like of int, shape (output, 2)
    n_baseline : int -- the baselines are the pairs (i < j) in lexicographic order

    Returns
    -------
    v2pm : ndarray, shape (pol, wave, output, 16)
        Columns ``F_0..F_3``, ``Re C_b`` (b = 0..5), ``Im C_b``.
    """
    t = np.asarray(t, float)
    c = np.asarray(contrast, float)
    th = np.asarray(phase, float)
    pairs = np.asarray(pairs, int)
    n_pol, n_out, n_tel, n_wave = t.shape
    base = sorted({(int(i), int(j)) for i, j in pairs})
    if len(base) != n_baseline:
        raise ValueError(f"pairs describe {len(base)} baselines, expected {n_baseline}")
    bidx = np.array([base.index((int(i), int(j))) for i, j in pairs])
    o = np.arange(n_out)
    m = np.zeros((n_pol, n_wave, n_out, n_tel + 2 * n_baseline))
    m[..., :n_tel] = t.transpose(0, 3, 1, 2)
    amp = 2 * np.sqrt(t[:, o, pairs[:, 0]] * t[:, o, pairs[:, 1]]) * c  # (pol, out, wave)
    re = (amp * np.cos(th)).transpose(0, 2, 1)                          # (pol, wave, out)
    im = (-amp * np.sin(th)).transpose(0, 2, 1)
    m[:, :, o, n_tel + bidx] = re
    m[:, :, o, n_tel + n_baseline + bidx] = im
    return m


def output_noise_weights(v2pm, *, read_noise_var=0.0, flux=None):
    """Inverse noise variance of every output for a source of given telescope fluxes.

    Photon noise of the incoherent part ``sum_i t_ki F_i`` plus a read-noise
    variance; with ``flux`` None, equal unit fluxes (a photon-noise proxy).

    Parameters
    ----------
    v2pm : array_like, shape (pol, wave, output, 16)
    read_noise_var : float or array_like broadcastable to (pol, wave, output)
    flux : array_like, shape (pol, telescope, wave), optional

    Returns
    -------
    weights : ndarray, shape (pol, wave, output)
    """
    m = np.asarray(v2pm, float)
    f = np.ones((m.shape[0], 4, m.shape[1])) if flux is None else np.asarray(flux, float)
    var = np.einsum("pwki,piw->pwk", m[..., :4], f) + read_noise_var
    return 1.0 / np.maximum(var, 1e-300)


def weighted_pinv(v2pm, *, weights=None):
    """Noise-weighted pseudo-inverse (P2VM) ``(M^T W M)^-1 M^T W``.

    Parameters
    ----------
    v2pm : array_like, shape (..., output, 16)
    weights : array_like, shape (..., output), optional -- inverse variances (default 1)

    Returns
    -------
    p2vm : ndarray, shape (..., 16, output) -- NaN where the V2PM or weights have NaNs

    References
    ----------
    Tatulli, E. et al. 2007, A&A 464, 29 (the visibility-to-pixel matrix method).
    """
    m = np.asarray(v2pm, float)
    w = np.ones(m.shape[:-1]) if weights is None else np.asarray(weights, float)
    w = np.sqrt(np.broadcast_to(w, m.shape[:-1]))[..., :, None]
    bad = ~(np.isfinite(m).all(axis=(-1, -2)) & np.isfinite(w).all(axis=(-1, -2)))
    wm = np.where(bad[..., None, None], 0.0, w * m)
    # pinv of the whitened matrix sqrt(W) M, then re-apply sqrt(W): (M^T W M)^-1 M^T W
    p = np.linalg.pinv(wm) * np.swapaxes(np.where(bad[..., None, None], 0.0, w), -1, -2)
    return np.where(bad[..., None, None], np.nan, p)


def condition_number(v2pm):
    """2-norm condition number of the V2PM per (pol, wave) (ratio of extreme singular values)."""
    m = np.asarray(v2pm, float)
    bad = ~np.isfinite(m).all(axis=(-1, -2))
    s = np.linalg.svd(np.where(bad[..., None, None], 1.0, m), compute_uv=False)
    return np.where(bad, np.nan, s[..., 0] / s[..., -1])


def model_residuals(v2pm, p2vm, intensity, *, variance=None):
    """Residuals of the model on calibration frames: fit the 16 unknowns with the P2VM,
    re-predict the outputs with the V2PM.

    Parameters
    ----------
    v2pm : array_like, shape (pol, wave, output, 16)
    p2vm : array_like, shape (pol, wave, 16, output)
    intensity : array_like, shape (frame, pol, output, wave)
    variance : array_like, same shape as intensity, optional

    Returns
    -------
    residual : ndarray (frame, pol, output, wave) -- data minus model
    chi2 : ndarray (pol, wave) -- mean of (residual^2 / variance) per degree of freedom
        (NaN without ``variance``)
    """
    i = np.asarray(intensity, float)
    x = np.einsum("pwuk,fpkw->fpuw", p2vm, i)
    model = np.einsum("pwku,fpuw->fpkw", v2pm, x)
    res = i - model
    if variance is None:
        return res, np.full(np.asarray(v2pm).shape[:2], np.nan)
    n_out = i.shape[2]
    dof = max(n_out - N_UNKNOWN, 1) / n_out
    chi2 = np.nanmean(res ** 2 / np.asarray(variance, float), axis=(0, 2)) / dof
    return res, chi2


def phase_set_qc(phase, nominal, *, n_phase: int = 4):
    """Quality of each baseline's set of phase shifts (closure of the ABCD set).

    Parameters
    ----------
    phase : array_like, shape (pol, output, wave), rad; outputs grouped by baseline
        (output k on baseline k // n_phase)
    nominal : array_like, shape (output,), rad

    Returns
    -------
    closure : ndarray (pol, baseline, wave), rad -- sum of the n_phase successive phase
        steps, each wrapped into [0, 2 pi), minus 2 pi: 0 for a set in the nominal order,
        a multiple of 2 pi if the order is broken
    imbalance : ndarray (pol, baseline, wave) -- |mean_k exp(i theta_k)|, 0 for an ideal set
    offset_rms : ndarray (pol, baseline, wave), rad -- RMS of (theta_k - nominal_k) about
        its mean over the set
    """
    th = np.asarray(phase, float)
    n_pol, n_out, n_wave = th.shape
    th = th.reshape(n_pol, n_out // n_phase, n_phase, n_wave)
    steps = np.mod(np.diff(np.concatenate([th, th[:, :, :1]], axis=2), axis=2), 2 * np.pi)
    closure = steps.sum(axis=2) - 2 * np.pi
    imbalance = np.abs(np.exp(1j * th).mean(axis=2))
    d = np.angle(np.exp(1j * (th - np.asarray(nominal, float).reshape(1, -1, n_phase, 1))))
    mean = np.angle(np.exp(1j * d).mean(axis=2, keepdims=True))
    offset_rms = np.sqrt(np.mean(np.angle(np.exp(1j * (d - mean))) ** 2, axis=2))
    return closure, imbalance, offset_rms
