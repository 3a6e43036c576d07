# SPDX-License-Identifier: BSD-3-Clause
"""Per-exposure averaging of phase-referenced frames: V2, closure phases,
referenced visibilities and photometry, with bootstrap errors over frames.

Every estimator here is a ratio of sums over frames, so a bootstrap resample
is just a vector of frame multiplicities: all resamples are computed at once
as ``counts @ per_frame_terms`` (no Python loop over frames, wavelengths or
resamples).

Estimators (per polarisation, baseline (i, j) and wavelength; sums over the
frames valid on that baseline):

* squared visibility, bias-corrected:

      V2 = sum_f (|C_ij,f|^2 - 2 s2_ij,f) / sum_f L_ij,f^2 F_i,f F_j,f

  where C is the referenced coherent flux, s2 the variance of each of its real
  and imaginary parts (photon + read noise, from the extraction), so that
  E|C_f|^2 = |C|^2 + 2 s2; F the photometric fluxes and L the contrast loss of
  the frame (1 if not given). Summing numerator and denominator before
  dividing keeps the estimator stable at low SNR (Perrin 2003, A&A 400, 1173,
  for the ratio-of-sums estimator; the quadratic bias term as in
  Tatulli et al. 2007, A&A 464, 29).
* closure phase: argument of the frame-averaged bispectrum
  B = C_ij C_jk conj(C_ik) on each triangle (i, j, k), the OIFITS v2 triple
  product of baselines (i, j), (j, k) and (k, i) (Duvert, Young & Hummel 2017,
  A&A 597, A8). The noise of the three baselines comes from disjoint outputs
  and is treated as independent, so no bispectrum bias term is removed.
  T3AMP = |<B>| / <L_ij L_jk L_ik F_i F_j F_k>.
* referenced (coherent) visibility: V = sum_f C_ij,f / sum_f L_ij,f sqrt(F_i,f F_j,f);
  its amplitude is debiased as sqrt(max(|sum C|^2 - 2 sum s2, 0)) / sum L sqrt(F F).
* photometric flux: mean over all frames of F_i.

Errors: standard deviation over ``n_boot`` bootstrap resamples of the frames
(Efron & Tibshirani 1993, An Introduction to the Bootstrap, Chapman & Hall),
drawn from ``numpy.random.default_rng(seed)``; phases are wrapped about the
full-sample value first; the variances are scaled by n / (n - 1) for n frames
used (the bootstrap's small-sample bias for means). The covariances between wavelengths of V2, of the
referenced phase and of the closure phase are returned as well (a common
residual piston makes the phases strongly correlated across the band).

Mask policy: ``frame_valid`` (True = use) removes frames per baseline; a
triangle uses the frames valid on its three baselines. Non-finite inputs in
valid frames raise ``ValueError`` (``nan_policy="raise"``) or are removed from
that baseline (``nan_policy="omit"``). A baseline with no valid frame gives NaN.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

from .trig import wrap_phase

__all__ = ["ExposureAverage", "average_exposure", "bootstrap_counts", "TRIANGLES", "BASELINES"]

BASELINES = ((0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3))
"""Baseline order of DEVELOPERS.md."""
TRIANGLES = ((0, 1, 2), (0, 1, 3), (0, 2, 3), (1, 2, 3))
"""Triangle order of DEVELOPERS.md."""


@dataclass(frozen=True)
class ExposureAverage:
    """Averaged observables of one exposure.

    Shapes use ``n_pol``, ``n_base`` (6), ``n_tri`` (4), ``n_tel`` (4), ``n_wave``.

    Attributes
    ----------
    vis2, vis2_err : (n_pol, n_base, n_wave), dimensionless, bias-corrected
    vis2_cov : (n_pol, n_base, n_wave, n_wave), bootstrap covariance of vis2
    t3phi, t3phi_err : (n_pol, n_tri, n_wave), radians, in (-pi, pi]
    t3phi_cov : (n_pol, n_tri, n_wave, n_wave), radians^2
    t3amp, t3amp_err : (n_pol, n_tri, n_wave), dimensionless
    visamp, visamp_err : (n_pol, n_base, n_wave), dimensionless (coherent average)
    visphi, visphi_err : (n_pol, n_base, n_wave), radians, in (-pi, pi]
    visphi_cov : (n_pol, n_base, n_wave, n_wave), radians^2
    flux, flux_err : (n_pol, n_tel, n_wave), unit of the input fluxes
    n_valid : (n_base,), int, frames used per baseline
    n_boot : int, seed : int
    """
    vis2: np.ndarray
    vis2_err: np.ndarray
    vis2_cov: np.ndarray
    t3phi: np.ndarray
    t3phi_err: np.ndarray
    t3phi_cov: np.ndarray
    t3amp: np.ndarray
    t3amp_err: np.ndarray
    visamp: np.ndarray
    visamp_err: np.ndarray
    visphi: np.ndarray
    visphi_err: np.ndarray
    visphi_cov: np.ndarray
    flux: np.ndarray
    flux_err: np.ndarray
    n_valid: np.ndarray
    n_boot: int
    seed: int


def bootstrap_counts(n_frame: int, *, n_boot: int, seed: int) -> np.ndarray:
    """Frame multiplicities of ``n_boot`` bootstrap resamples.

    Returns
    -------
    counts : ndarray, shape (n_boot, n_frame), float64
        Row b counts how often each frame was drawn (rows sum to n_frame).
    """
    if n_frame < 1 or n_boot < 2:
        raise ValueError(f"bootstrap needs n_frame >= 1 and n_boot >= 2, "
                         f"found n_frame={n_frame}, n_boot={n_boot}")
    idx = np.random.default_rng(seed).integers(0, n_frame, size=(n_boot, n_frame))
    counts = np.zeros((n_boot, n_frame))
    np.add.at(counts, (np.arange(n_boot)[:, None], idx), 1.0)
    return counts


def _sums(weights, x):
    """sum over frames of weights (k, frame) times x (frame, ...) -> (k, ...)."""
    return np.tensordot(weights, x, axes=(1, 0))


def average_exposure(coherent, coherent_var, flux, *, frame_valid=None, contrast_loss=None,
                     flux_var=None, coherent_raw=None, coherent_var_common=None,
                     flux_var_common=None, debias: bool = True, n_boot: int = 200,
                     seed: int = 0,
                     nan_policy: Literal["raise", "omit"] = "raise") -> ExposureAverage:
    """Average one exposure's frames into V2, closure phases, referenced
    visibilities and photometry, with bootstrap errors.

    Parameters
    ----------
    coherent : ndarray, shape (n_frame, n_pol, 6, n_wave), complex, e-/s
        Phase-referenced coherent fluxes C_ij (``reference`` product ``coherent_ref``).
    coherent_var : ndarray, same shape, float, (e-/s)^2
        Variance of each of Re C and Im C (``extract`` product ``coherent_var``).
    flux : ndarray, shape (n_frame, n_pol, 4, n_wave), float, e-/s
        Photometric fluxes F_i per frame.
    frame_valid : ndarray, shape (n_frame, 6), bool, optional
        True where a frame is usable on a baseline. Default: all valid.
    contrast_loss : ndarray, shape (n_frame, 6, n_wave), optional
        |<exp(-2 pi i (r_j - r_i) / lambda)>| of each frame; the coherent flux is
        taken as uncorrected for it and the loss enters the normalisation.
    flux_var : ndarray, like ``flux``, optional; unused by the estimators
        (photometric errors come from the bootstrap), accepted for symmetry.
    coherent_raw : ndarray, like ``coherent``, optional
        The coherent fluxes before referencing (``extract`` product ``coherent``),
        needed to propagate ``coherent_var_common``; default: ``coherent``.
    coherent_var_common : ndarray, shape (n_pol, 6, n_wave), optional
        Variance of each real part of an error common to every frame of the
        exposure (the subtracted background's own noise). The bootstrap over
        frames cannot see it; it is propagated to first order and added to the
        variances (diagonals of the covariances), and it enters the V2 bias.
    flux_var_common : ndarray, shape (n_pol, 4, n_wave), optional
        The same for the photometric fluxes.
    debias : bool
        Subtract the 2 s2 noise term from |C|^2 (True) or not (for diagnostics).
    n_boot : int, number of bootstrap resamples (>= 2)
    seed : int, seed of the bootstrap generator (reproducible errors)
    nan_policy : "raise" or "omit"

    Returns
    -------
    ExposureAverage
    """
    if nan_policy not in ("raise", "omit"):
        raise ValueError(f"nan_policy must be 'raise' or 'omit', found {nan_policy!r}")
    c = np.asarray(coherent)
    s2 = np.asarray(coherent_var, float)
    f = np.asarray(flux, float)
    if c.ndim != 4 or c.shape[2] != len(BASELINES):
        raise ValueError(f"coherent must have shape (frame, pol, 6, wave), found {c.shape}")
    n_frame, n_pol, n_base, n_wave = c.shape
    if s2.shape != c.shape:
        raise ValueError(f"coherent_var shape {s2.shape} differs from coherent {c.shape}")
    if f.shape != (n_frame, n_pol, 4, n_wave):
        raise ValueError(f"flux must have shape {(n_frame, n_pol, 4, n_wave)}, found {f.shape}")
    valid = (np.ones((n_frame, n_base), bool) if frame_valid is None
             else np.asarray(frame_valid, bool))
    if valid.shape != (n_frame, n_base):
        raise ValueError(f"frame_valid must have shape {(n_frame, n_base)}, found {valid.shape}")
    loss = (np.ones((n_frame, n_base, n_wave)) if contrast_loss is None
            else np.asarray(contrast_loss, float))
    if loss.shape != (n_frame, n_base, n_wave):
        raise ValueError(f"contrast_loss must have shape {(n_frame, n_base, n_wave)}, "
                         f"found {loss.shape}")

    ii = np.array([b[0] for b in BASELINES])
    jj = np.array([b[1] for b in BASELINES])
    fi, fj = f[:, :, ii, :], f[:, :, jj, :]                        # (frame, pol, base, wave)
    lo = loss[:, None, :, :]                                        # (frame, 1, base, wave)
    finite = (np.isfinite(c) & np.isfinite(s2) & np.isfinite(fi) & np.isfinite(fj)
              & np.isfinite(lo))
    # weights per (frame, pol, base, wave): 1 where used
    w = valid[:, None, :, None] & np.ones(c.shape, bool)
    bad = w & ~finite
    if bad.any():
        if nan_policy == "raise":
            raise ValueError(f"{int(bad.sum())} non-finite values in valid frames; pass "
                             "nan_policy='omit' to drop them or flag the frames in frame_valid")
        w = w & finite
    wf = w.astype(float)
    cz = np.where(w, c, 0)
    s2z = np.where(w, s2, 0.0)
    ffz = np.where(w, fi * fj, 0.0)
    loz = np.where(w, lo, 0.0)

    # per-frame terms, stacked on a trailing "term" axis of the V2/vis part
    vc = (np.zeros((n_pol, n_base, n_wave)) if coherent_var_common is None
          else np.broadcast_to(np.asarray(coherent_var_common, float), (n_pol, n_base, n_wave)))
    s2c = np.where(w, s2 + vc, 0.0)       # frame noise plus the common part (bias)
    num2 = np.abs(cz) ** 2 - (2 * s2c if debias else 0.0)
    den2 = loz ** 2 * ffz
    sqff = loz * np.sqrt(np.clip(ffz, 0, None))

    # bispectrum terms on triangles
    tri_ij = np.array([BASELINES.index((a, b)) for a, b, _ in TRIANGLES])
    tri_jk = np.array([BASELINES.index((b, k)) for _, b, k in TRIANGLES])
    tri_ik = np.array([BASELINES.index((a, k)) for a, _, k in TRIANGLES])
    wt = w[:, :, tri_ij] & w[:, :, tri_jk] & w[:, :, tri_ik]
    bisp = np.where(wt, cz[:, :, tri_ij] * cz[:, :, tri_jk] * np.conj(cz[:, :, tri_ik]), 0)
    tel = np.array(TRIANGLES)
    b_norm = np.where(wt, loz[:, :, tri_ij] * loz[:, :, tri_jk] * loz[:, :, tri_ik]
                      * f[:, :, tel[:, 0]] * f[:, :, tel[:, 1]] * f[:, :, tel[:, 2]], 0.0)

    fluxz = np.where(np.isfinite(f), f, 0.0)
    fw = np.isfinite(f).astype(float)
    if nan_policy == "raise" and not np.isfinite(f).all():
        raise ValueError("non-finite photometric fluxes; pass nan_policy='omit'")

    counts = bootstrap_counts(n_frame, n_boot=n_boot, seed=seed)
    weights = np.vstack([np.ones((1, n_frame)), counts])           # row 0: full sample

    with np.errstate(invalid="ignore", divide="ignore"):
        v2 = _sums(weights, num2) / _sums(weights, den2)
        sc = _sums(weights, cz)
        ss2 = _sums(weights, s2z)
        ssq = _sums(weights, sqff)
        amp2 = np.abs(sc) ** 2 - (2 * ss2 if debias else 0.0)
        visamp = np.sqrt(np.clip(amp2, 0, None)) / ssq
        visphi = np.angle(sc)
        sb = _sums(weights, bisp)
        t3amp = np.abs(sb) / _sums(weights, b_norm)
        t3phi = np.angle(sb)
        fl = _sums(weights, fluxz) / _sums(weights, fw)
    # empty baselines / triangles -> NaN
    nv = _sums(weights, wf)
    v2 = np.where(nv > 0, v2, np.nan)
    visamp = np.where(nv > 0, visamp, np.nan)
    visphi = np.where(nv > 0, visphi, np.nan)
    nt = _sums(weights, wt.astype(float))
    t3amp = np.where(nt > 0, t3amp, np.nan)
    t3phi = np.where(nt > 0, t3phi, np.nan)

    # the bootstrap variance of a mean of n frames is (n - 1) / n times the usual
    # estimate s^2 / n (Efron & Tibshirani 1993, ch. 5): scale it back
    def inflate(n):
        return np.where(n > 1, n / np.maximum(n - 1, 1), np.nan)

    g_base, g_tri, g_tel = inflate(nv[0]), inflate(nt[0]), inflate(_sums(weights, fw)[0])

    def err(x, g, phase=False):
        d = x[1:] - x[0]
        return np.std(wrap_phase(d) if phase else d, axis=0, ddof=1) * np.sqrt(g)

    def cov(x, g, phase=False):
        d = x[1:] - x[0]
        if phase:
            d = wrap_phase(d)
        d = np.moveaxis((d - d.mean(axis=0)) * np.sqrt(g), 0, -1)          # (p, k, w, b)
        return d @ np.swapaxes(d, -1, -2) / (n_boot - 1)                  # (p, k, w, w)

    raw = c if coherent_raw is None else np.asarray(coherent_raw)
    if raw.shape != c.shape:
        raise ValueError(f"coherent_raw shape {raw.shape} differs from coherent {c.shape}")
    vf = (np.zeros((n_pol, 4, n_wave)) if flux_var_common is None
          else np.broadcast_to(np.asarray(flux_var_common, float), (n_pol, 4, n_wave)))
    extra = _common_mode(np.where(w, raw, 0), cz, w, wt, vc, vf, f, loz, v2[0], visamp[0],
                         tri=(tri_ij, tri_jk, tri_ik), b_norm=b_norm, sb=sb[0],
                         ssq=ssq[0], den=_sums(weights[:1], den2)[0])

    def add_diag(cv, var):
        return cv + np.eye(cv.shape[-1]) * var[..., None]

    def tot(e, var):
        return np.sqrt(e ** 2 + var)

    e_v2, e_phi, e_t3 = err(v2, g_base), err(visphi, g_base, True), err(t3phi, g_tri, True)
    return ExposureAverage(
        vis2=v2[0], vis2_err=tot(e_v2, extra["vis2"]),
        vis2_cov=add_diag(cov(v2, g_base), extra["vis2"]),
        t3phi=t3phi[0], t3phi_err=tot(e_t3, extra["t3phi"]),
        t3phi_cov=add_diag(cov(t3phi, g_tri, True), extra["t3phi"]),
        t3amp=t3amp[0], t3amp_err=tot(err(t3amp, g_tri), extra["t3amp"]),
        visamp=visamp[0], visamp_err=tot(err(visamp, g_base), extra["visamp"]),
        visphi=visphi[0], visphi_err=tot(e_phi, extra["visphi"]),
        visphi_cov=add_diag(cov(visphi, g_base, True), extra["visphi"]),
        flux=fl[0], flux_err=tot(err(fl, g_tel), vf),
        n_valid=valid.sum(axis=0).astype(int), n_boot=int(n_boot), seed=int(seed))


def _common_mode(raw, ref, w, wt, vc, vf, f, loss, vis2, visamp, *, tri, b_norm, sb, ssq, den):
    """First-order variances from errors common to every frame (full sample).

    A common complex error d (variance ``vc`` per real part) on the raw coherent
    flux of a baseline changes sum_f |C_f|^2 by 2 Re(d* sum_f C_f), the referenced
    sum by d sum_f u_f (u_f = C_ref,f / C_raw,f, the referencing rotation) and
    the bispectrum sum by d_ij sum_f C_jk C_ik* + ...; a common error on F_i
    changes sum_f L^2 F_i F_j by d_i sum_f L^2 F_j.
    """
    ii = np.array([b[0] for b in BASELINES])
    jj = np.array([b[1] for b in BASELINES])
    s_raw = raw.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        u = np.where(np.abs(raw) > 0, ref / np.where(raw == 0, 1, raw), 0)
        su = np.abs(u.sum(axis=0)) ** 2
        fz = np.where(w, f[:, :, jj], 0.0), np.where(w, f[:, :, ii], 0.0)
        dfi = (loss ** 2 * fz[0]).sum(axis=0)        # d D / d F_i
        dfj = (loss ** 2 * fz[1]).sum(axis=0)
        v_v2 = (4 * vc * np.abs(s_raw) ** 2 / den ** 2
                + (vis2 / den) ** 2 * (vf[:, ii] * dfi ** 2 + vf[:, jj] * dfj ** 2))
        s_ref = np.abs(ref.sum(axis=0)) ** 2
        v_phi = vc * su / s_ref
        fbar = np.where(w, f[:, :, ii], 0).sum(0), np.where(w, f[:, :, jj], 0).sum(0)
        nw = w.sum(axis=0)
        v_amp = (vc * su / ssq ** 2 + (visamp / 2) ** 2
                 * (vf[:, ii] / (fbar[0] / nw) ** 2 + vf[:, jj] / (fbar[1] / nw) ** 2))
        a, b, c = tri
        rt = wt.astype(float)
        cij, cjk, cik = raw[:, :, a] * rt, raw[:, :, b] * rt, raw[:, :, c] * rt
        perp = (vc[:, a] * np.abs((cjk * np.conj(cik)).sum(0)) ** 2
                + vc[:, b] * np.abs((cij * np.conj(cik)).sum(0)) ** 2
                + vc[:, c] * np.abs((cij * cjk).sum(0)) ** 2)
        v_t3 = perp / np.abs((cij * cjk * np.conj(cik)).sum(0)) ** 2
        v_t3a = perp / b_norm.sum(axis=0) ** 2
    return {k: np.where(np.isfinite(v), v, 0.0) for k, v in
            {"vis2": v_v2, "visphi": v_phi, "visamp": v_amp, "t3phi": v_t3,
             "t3amp": v_t3a}.items()}
