# SPDX-License-Identifier: BSD-3-Clause
"""Wavelength calibration from delay scans (Fourier-transform spectroscopy).

A lamp scan moves the optical path difference (OPD) ``o`` of each baseline
through the fringes; every spectral pixel then records

    I(o) = A + B env(o - o_c) cos(2 pi sigma o - theta)

with ``sigma = 1 / lambda_eff`` its effective vacuum wavenumber, ``env`` the
coherence envelope of its spectral channel (Gaussian channel of FWHM
``delta_sigma``: ``exp(-(pi delta_sigma o)^2 / (4 ln 2))``,
``pipeline.skymodel.smearing_envelope``) and ``theta`` an instrumental phase.
The OPD of every sample is known from the metrology, so the samples need not be
uniform and may undersample the fringes.

Method (phase-slope estimation on the known sampling): the OPD range is cut
into short blocks; in each block a linear least-squares fit of
``a + C cos(2 pi sigma_0 o) + S sin(2 pi sigma_0 o)`` (valid for any sampling
that is not degenerate at ``sigma_0``) gives a complex amplitude
``u = C - i S = B env exp(i (2 pi (sigma - sigma_0) o - theta))``. The phase
difference of consecutive blocks gives ``sigma - sigma_0`` without unwrapping
(first guess ``sigma_0`` from the nominal dispersion law), a weighted linear fit
of the block phases against OPD refines it, and a Gaussian fit of ``|u|`` against
OPD gives a first envelope width. A final Levenberg-Marquardt fit of the full
model to every sample (wavenumber, envelope width and centre non-linear; offset,
slope and complex amplitude linear) removes the block approximation and gives
the errors; the effective bandwidth is ``delta_lambda = delta_sigma lambda^2``. Fringe-tracking group-delay methods use
the same demodulation idea (e.g. Lawson 2000, *Principles of Long Baseline
Stellar Interferometry*, JPL 00-009, ch. 8).

Axes: samples first, ``(sample, ...)``; the trailing axes (e.g. ``(trace, x)``
or ``(output, ft_wave)``) are carried through. Metres throughout.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.polynomial import polynomial as npoly

from .trig import cos_sin, sinc

__all__ = ["ScanFit", "fit_fringe_scan", "fringe_phasor", "fit_dispersion_law",
           "common_grid", "gaussian_envelope", "baseline_bandwidth"]

_FOUR_LN2 = 4 * np.log(2)


def gaussian_envelope(opd_m, wave_m, bandwidth_m):
    """Coherence envelope of a Gaussian channel (same formula as
    ``pipeline.skymodel.smearing_envelope``). Broadcasts."""
    dsig = np.asarray(bandwidth_m) / np.asarray(wave_m) ** 2
    return np.exp(-(np.pi * dsig * np.asarray(opd_m)) ** 2 / _FOUR_LN2)


@dataclass(frozen=True)
class ScanFit:
    """Per-pixel result of :func:`fit_fringe_scan`, each of shape ``pixel_shape``.

    Attributes
    ----------
    wave : effective vacuum wavelength 1 / sigma, m (NaN if the pixel shows no fringes)
    wave_err : its 1-sigma error from the phase-slope fit, m
    bandwidth : effective FWHM bandwidth of the channel, m
    bandwidth_err : its 1-sigma error from the envelope fit, m (large when the scan
        covers too little of the envelope)
    opd_centre : OPD of the envelope peak, m
    amplitude : fringe amplitude B at the envelope peak (intensity unit)
    phase : theta, rad -- fringe phase at OPD 0
    snr : fringe amplitude / its noise (pixels below ``min_snr`` are NaN elsewhere)
    """
    wave: np.ndarray
    wave_err: np.ndarray
    bandwidth: np.ndarray
    bandwidth_err: np.ndarray
    opd_centre: np.ndarray
    amplitude: np.ndarray
    phase: np.ndarray
    snr: np.ndarray


class _Blocks:
    """Block-wise least squares of ``a + C cos + S sin`` at a trial wavenumber, on fixed
    blocks of OPD. intensity, opd, use: (sample, pix), ``use`` 0/1 weights.

    What does not depend on the wavenumber (each sample's block, the sample counts, the
    sums of the intensity, its square and the OPD) is summed once; each call then sums
    the six products with the cosine and sine (cos^2 + sin^2 = 1 gives the seventh)."""

    def __init__(self, intensity, opd, n_block, use):
        n_s, n_p = intensity.shape
        used = use > 0
        lo = np.where(used, opd, np.inf).min(axis=0)
        hi = np.where(used, opd, -np.inf).max(axis=0)
        blk = np.clip(((opd - lo) / np.maximum(hi - lo, 1e-30) * n_block).astype(int), 0,
                      n_block - 1)
        self.n_bins = n_p * n_block
        idx = np.arange(n_p)[None, :] * n_block + blk
        # unused samples go to one spare bin past the end, dropped after each sum
        self.idx = np.where(used, idx, self.n_bins).ravel()
        self.shape = (n_p, n_block)
        self.y, self.opd = intensity, opd
        self.n = self.sum(None)
        self.sy, self.syy, so = self.sum(intensity), self.sum(intensity * intensity), self.sum(opd)
        self.o_mean = so / np.maximum(self.n, 1)

    def sum(self, v):
        """Sum of v (sample, pix) over each pixel's blocks (None: count), (pix, block)."""
        return np.bincount(self.idx, weights=None if v is None else v.ravel(),
                           minlength=self.n_bins + 1)[:self.n_bins].reshape(self.shape)

    def amplitudes(self, sigma0):
        """u, o_mean, noise, ok (pix, block) at the wavenumbers ``sigma0`` (pix,)."""
        c, s = cos_sin((2 * np.pi) * sigma0[None, :] * self.opd)
        y = self.y
        n = self.n
        sc, ss, scc, scs = self.sum(c), self.sum(s), self.sum(c * c), self.sum(c * s)
        sss = n - scc
        syc, sys = self.sum(y * c), self.sum(y * s)
        # normal matrix [[n, sc, ss], [sc, scc, scs], [ss, scs, sss]] per (pix, block),
        # inverted by its cofactors (symmetric 3 x 3: ten times faster than a batched
        # LAPACK inverse of so many small matrices)
        c00, c01, c02 = scc * sss - scs * scs, ss * scs - sc * sss, sc * scs - ss * scc
        c11, c12, c22 = n * sss - ss * ss, sc * ss - n * scs, n * scc - sc * sc
        det = n * c00 + sc * c01 + ss * c02
        # degenerate sampling (all samples at one fringe phase) or too few samples
        ok = (n >= 6) & (np.abs(det) > 1e-6 * np.maximum(n, 1) ** 3)
        inv_det = np.where(ok, 1.0 / np.where(ok, det, 1.0), 0.0)
        sy = self.sy
        a = (c00 * sy + c01 * syc + c02 * sys) * inv_det
        cc = (c01 * sy + c11 * syc + c12 * sys) * inv_det
        ss_ = (c02 * sy + c12 * syc + c22 * sys) * inv_det
        chi2 = self.syy - (a * sy + cc * syc + ss_ * sys)
        resvar = np.maximum(chi2, 0) / np.maximum(n - 3, 1)
        # variance of C and S ~ resvar * (M^-1)_11,22; average of the two
        noise = np.sqrt(resvar * 0.5 * (c11 + c22) * inv_det)
        u = cc - 1j * ss_
        return np.where(ok, u, 0), self.o_mean, np.where(ok, noise, np.inf), ok


def fit_fringe_scan(intensity, opd, wave_guess, *, n_block: int = 32, n_iter: int = 3,
                    opd_span=None, bandwidth_guess=None, max_opd=None,
                    min_snr: float = 5.0) -> ScanFit:
    """Effective wavelength, bandwidth, phase and amplitude of every pixel's fringes.

    Parameters
    ----------
    intensity : array_like, shape (n_sample, *pixel_shape)
        Detected flux per sample (e- or ADU), dark subtracted; NaN samples are not
        allowed (drop those samples first).
    opd : array_like, broadcastable to ``intensity``, m
        Known OPD of each sample and pixel (metrology ``PATH_j - PATH_i`` of the
        pixel's baseline, averaged over the sample's exposure).
    wave_guess : array_like, shape pixel_shape, m
        First guess (nominal law); must be within ``~0.4 / (block OPD length)`` in
        wavenumber of the truth.
    n_block : int -- OPD blocks over the scan (each needs >= 6 samples)
    n_iter : int -- refinement iterations
    opd_span : array_like, broadcastable to ``intensity``, m, optional
        OPD travelled during each sample's exposure; the fringe amplitude is
        corrected for the resulting ``sinc(sigma * span)`` smearing.
    bandwidth_guess : array_like, broadcastable to pixel_shape, m, optional
        First guess of the bandwidth where the block envelope shows no curvature
        (scan much shorter than the coherence length); default lambda / 200.
    max_opd : array_like, broadcastable to pixel_shape, m, optional
        Only samples with ``|opd| <= max_opd`` are fitted (the central fringe packet).
    min_snr : float -- blocks below this fringe SNR are left out of the fits

    Returns
    -------
    ScanFit
    """
    if n_iter < 1:
        raise ValueError(f"n_iter must be >= 1, found {n_iter}")
    y = np.asarray(intensity, float)
    pshape = y.shape[1:]
    n_s = y.shape[0]
    y = y.reshape(n_s, -1)
    if not np.isfinite(y).all():
        raise ValueError("intensity has non-finite samples; drop them before the fit")
    o = np.broadcast_to(np.asarray(opd, float), (n_s, *pshape)).reshape(n_s, -1)
    sig = 1.0 / np.asarray(wave_guess, float).reshape(-1)
    n_p = y.shape[1]
    use = np.ones((n_s, n_p)) if max_opd is None else (
        np.abs(o) <= np.broadcast_to(np.asarray(max_opd, float), pshape).reshape(-1)).astype(float)
    span = None if opd_span is None else np.broadcast_to(
        np.asarray(opd_span, float), (n_s, *pshape)).reshape(n_s, -1)
    kept = use.any(axis=1)
    if not kept.all():      # samples outside every pixel's window (a long scan's wings)
        y, o, use = y[kept], o[kept], use[kept]
        span = None if span is None else span[kept]
        n_s = y.shape[0]
        if n_s == 0:
            raise ValueError("no sample lies within max_opd of zero OPD")
    if n_s < 6 * n_block:
        n_block = max(n_s // 6, 4)
    blocks = _Blocks(y, o, n_block, use)
    for it in range(n_iter + 1):
        u, ob, noise, ok = blocks.amplitudes(sig)
        snr = np.abs(u) / noise
        good = ok & (snr > min_snr)
        w = np.where(good, np.abs(u) ** 2, 0.0)
        if it == 0:
            # consecutive-block phase differences: slope without unwrapping
            prod = u[:, 1:] * np.conj(u[:, :-1]) * (good[:, 1:] & good[:, :-1])
            dob = np.where(good[:, 1:] & good[:, :-1], ob[:, 1:] - ob[:, :-1], 0.0)
            step = np.sum(np.abs(prod) * dob, 1) / np.maximum(np.sum(np.abs(prod), 1), 1e-300)
            dsig = np.angle(prod.sum(1)) / (2 * np.pi * np.where(step > 0, step, np.inf))
        else:
            mean = np.sum(u * good, 1)
            phi = np.angle(u * np.conj(mean)[:, None])
            wsum = np.maximum(w.sum(1), 1e-300)
            oc = np.sum(w * ob, 1) / wsum
            sxx = np.sum(w * (ob - oc[:, None]) ** 2, 1)
            dsig = np.sum(w * (ob - oc[:, None]) * phi, 1) / np.maximum(sxx, 1e-300) / (2 * np.pi)
        if it < n_iter:
            sig = sig + np.where(np.isfinite(dsig), dsig, 0.0)
    sig = sig + np.where(np.isfinite(dsig), dsig, 0.0)
    # envelope first guess: log|u| quadratic in OPD over blocks above 10% of the peak
    amp = np.abs(u)
    keep = good & (amp > 0.1 * amp.max(1, keepdims=True))
    wl = np.where(keep, amp ** 2 / noise ** 2, 0.0)              # var(ln|u|) ~ (noise/|u|)^2
    oscale = np.maximum(np.abs(ob).max(1, keepdims=True), 1e-30)
    x = ob / oscale
    basis = np.stack([np.ones_like(x), x, x * x], -1)
    lhs = np.einsum("pb,pbi,pbj->pij", wl, basis, basis)
    rhs = np.einsum("pb,pbi,pb->pi", wl, basis, np.log(np.maximum(amp, 1e-300)))
    enough = keep.sum(1) >= 4
    lhs = np.where(enough[:, None, None], lhs, np.eye(3))
    coef = np.linalg.solve(lhs, rhs[..., None])[..., 0]
    c2 = coef[:, 2] / oscale[:, 0] ** 2
    c1 = coef[:, 1] / oscale[:, 0]
    curved = enough & (c2 < 0)
    fallback = sig / 200.0 if bandwidth_guess is None else np.broadcast_to(
        np.asarray(bandwidth_guess, float), pshape).reshape(-1) * sig ** 2
    dsig_ch = np.where(curved, np.sqrt(np.abs(c2) * _FOUR_LN2) / np.pi, fallback)
    centre = np.where(curved, -c1 / (2 * np.where(curved, c2, 1.0)), 0.0)
    centre = np.clip(centre, np.where(use > 0, o, np.inf).min(0),
                     np.where(use > 0, o, -np.inf).max(0))
    # final step: Gauss-Newton on every sample, in chunks of pixels (bounded memory);
    # pixels ordered by their window, each chunk fitted on the samples it uses only
    out = {k: np.empty(n_p, dtype=complex if k == "z" else float)
           for k in ("sig", "sig_err", "dch", "dch_err", "oc", "z", "z_err")}
    chunk = max(1, 4_000_000 // (7 * n_s))
    order = np.argsort(np.argmax(use > 0, axis=0), kind="stable")
    for p0 in range(0, n_p, chunk):
        idx = order[p0:p0 + chunk]
        rows = np.flatnonzero(use[:, idx].any(axis=1))
        cut = np.ix_(rows, idx)
        r = _gauss_newton(y[cut], o[cut], None if span is None else span[cut],
                          sig[idx], dsig_ch[idx], centre[idx], use[cut])
        for k in out:
            out[k][idx] = r[k]
    sig = out["sig"]
    wave = 1 / sig
    snr_fit = np.abs(out["z"]) / np.maximum(out["z_err"], 1e-300)
    valid = np.isfinite(sig) & (snr_fit > min_snr)
    nan = np.where(valid, 1.0, np.nan)
    return ScanFit(wave=(wave * nan).reshape(pshape),
                   wave_err=(out["sig_err"] * wave ** 2 * nan).reshape(pshape),
                   bandwidth=(out["dch"] * wave ** 2 * nan).reshape(pshape),
                   bandwidth_err=(out["dch_err"] * wave ** 2 * nan).reshape(pshape),
                   opd_centre=(out["oc"] * nan).reshape(pshape),
                   amplitude=(np.abs(out["z"]) * nan).reshape(pshape),
                   phase=(np.angle(out["z"]) * nan).reshape(pshape),
                   snr=snr_fit.reshape(pshape))


def _weighted_gram(weight, basis):
    """sum_s weight[s, p] basis[s, p, i] basis[s, p, j] -> (p, i, j), as one batched
    matrix product per pixel (BLAS), not a three-operand einsum."""
    b = basis.transpose(1, 0, 2)                                        # (p, s, i)
    return (b * weight.T[:, :, None]).transpose(0, 2, 1) @ b


def _weighted_project(basis, values):
    """sum_s basis[s, p, i] values[s, p] -> (p, i)."""
    return (basis.transpose(1, 2, 0) @ values.T[:, :, None])[..., 0]


def _gauss_newton(y, o, span, sig, dch, oc, use, n_iter=8, tol=1e-6):
    """Levenberg-Marquardt fit of A0 + A1 o + env(o - oc) s(sig) Re[Z e^{-2 pi i sig o}]
    per pixel. y, o, span: (sample, pix); sig, dch, oc: (pix,); use: (sample, pix) 0/1.

    Each pixel stops once its step is predicted to lower chi2 by no more than ``tol``
    times its residual variance (every parameter then moves by ~sqrt(tol) of its error or
    less; from the block estimates most pixels converge in about three steps); it is
    evaluated once more after that step for its covariance, and left out of the later
    iterations of the pixels still moving."""
    n_s, n_p = y.shape
    oscale = np.maximum(np.abs(o).max(0), 1e-30)
    sig, dch, oc = sig.copy(), np.abs(dch).copy(), oc.copy()
    k4 = np.pi ** 2 / _FOUR_LN2
    # pixel-major (pix, sample) copies, and the Jacobian parameter-major (pix, 7, sample):
    # every column is a contiguous row, written in place, and every sum over samples is
    # one batched matrix product
    yt, ot = np.ascontiguousarray(y.T), np.ascontiguousarray(o.T)
    wt = None if np.all(use == 1) else np.ascontiguousarray(use.T)
    st = None if span is None else np.ascontiguousarray(span.T)
    n_used = np.full(n_p, n_s) if wt is None else wt.sum(1)
    lin, norm, resvar = np.empty((n_p, 4)), np.empty((n_p, 7)), np.empty(n_p)
    jtj_n = np.empty((n_p, 7, 7))
    last = np.zeros(n_p, bool)            # the pixel's next evaluation is its last
    act = np.arange(n_p)                  # pixels still being fitted (sorted)
    held = None                           # pixels whose rows are gathered below
    for it in range(n_iter + 1):
        if held is None or act.size < 0.8 * held.size:    # gather the active rows again
            held = act
            yh, oh = yt[held], ot[held]
            wh = None if wt is None else wt[held]
            sh = None if st is None else st[held]
            two_pi_o = (2 * np.pi) * oh
            jac = np.empty((held.size, 7, n_s))
            jac[:, 0] = 1.0
            jac[:, 1] = oh / oscale[held, None]
            lin_b = jac[:, :4]
            jac_w = jac if wh is None else np.empty_like(jac)
            if wh is not None:
                jac_w[:, :2] = jac[:, :2] * wh[:, None]
            lin_w = jac_w[:, :4]
        rows = np.searchsorted(held, act)
        sg, dc = sig[held, None], dch[held, None]
        xo = oh - oc[held, None]
        env = dc * xo
        env *= env
        env *= -k4
        np.exp(env, out=env)
        if sh is not None:
            env *= sinc(sg * sh)
        c, s = cos_sin(sg * two_pi_o)
        np.multiply(env, c, out=jac[:, 2])                     # env cos, env sin
        np.multiply(env, s, out=jac[:, 3])
        if wh is not None:
            np.multiply(jac[:, 2:4], wh[:, None], out=jac_w[:, 2:4])
        m = lin_w @ lin_b.transpose(0, 2, 1)                               # (pix, 4, 4)
        rhs = lin_w @ yh[..., None]
        lh = np.linalg.solve(m + 1e-12 * np.eye(4) * np.trace(m, axis1=1, axis2=2)[:, None, None],
                             rhs)[..., 0]
        a2, a3 = lh[:, 2:3], lh[:, 3:4]
        efr = a2 * jac[:, 2]                                   # env fr, env dfr
        efr += a3 * jac[:, 3]
        edfr = a3 * jac[:, 2]
        edfr -= a2 * jac[:, 3]
        np.multiply(edfr, two_pi_o, out=jac[:, 4])
        efr *= xo                                              # env fr xo 2 k4 dc
        efr *= (2 * k4) * dc
        np.multiply(efr, xo, out=jac[:, 5])
        jac[:, 5] *= -1
        np.multiply(efr, dc, out=jac[:, 6])
        res = yh - (lh[:, None, :] @ lin_b)[:, 0]
        if wh is not None:
            res *= wh
            np.multiply(jac[:, 4:], wh[:, None], out=jac_w[:, 4:])
        # J^T W J from its blocks: the linear columns' block is m; the rest is the three
        # nonlinear rows against all seven (the matrix is symmetric)
        jtj = np.empty((held.size, 7, 7))
        jtj[:, :4, :4] = m
        jtj[:, 4:] = jac_w[:, 4:] @ jac.transpose(0, 2, 1)
        jtj[:, :4, 4:] = jtj[:, 4:, :4].transpose(0, 2, 1)
        nh = np.sqrt(np.maximum(np.einsum("pii->pi", jtj), 1e-300))
        lin[act], norm[act] = lh[rows], nh[rows]
        jtj_n[act] = jtj[rows] / nh[rows, :, None] / nh[rows, None, :]
        resvar[act] = np.sum(res[rows] ** 2, 1) / np.maximum(n_used[act] - 7, 1)
        going = ~last[act] if it < n_iter else np.zeros(act.size, bool)
        if not going.any():
            break
        act, rows = act[going], rows[going]
        # gradient J^T W r: for the linear columns it is rhs - m lh (zero but for the
        # regularisation of their solve), for the nonlinear ones one product
        g = np.empty((held.size, 7))
        g[:, :4] = rhs[..., 0] - (m @ lh[..., None])[..., 0]
        g[:, 4:] = (jac[:, 4:] @ res[..., None])[..., 0]
        g = g[rows] / norm[act]
        step_n = np.linalg.solve(jtj_n[act] + 1e-3 * np.eye(7), g[..., None])[..., 0]
        step = step_n / norm[act]
        last[act] = ~(np.sum(g * step_n, 1) > tol * resvar[act])     # NaN: no say
        lim = 0.05 / oscale[act]
        sig[act] += np.clip(step[:, 4], -lim, lim)
        d = dch[act]
        dch[act] = d = np.abs(d + np.clip(step[:, 5], -0.5 * d, 0.5 * d))
        lim = 0.2 / np.maximum(d, 1e-30)
        oc[act] += np.clip(step[:, 6], -lim, lim)
    cov = np.linalg.pinv(jtj_n) / norm[:, :, None] / norm[:, None, :] * resvar[:, None, None]
    return {"sig": sig, "sig_err": np.sqrt(np.abs(cov[:, 4, 4])), "dch": dch,
            "dch_err": np.sqrt(np.abs(cov[:, 5, 5])), "oc": oc,
            "z": lin[:, 2] + 1j * lin[:, 3],
            "z_err": np.sqrt(0.5 * np.abs(cov[:, 2, 2] + cov[:, 3, 3]))}


def fringe_phasor(intensity, opd, wave, bandwidth, *, opd_centre=0.0, opd_span=None,
                  variance=None, max_opd=None):
    """Linear least-squares fringe phasor of every pixel with known wavelength and envelope.

    Fits ``I = A0 + A1 o / o_max + env(o - o_c) s Re[Z exp(-2 pi i o / lambda)]`` where
    ``s = sinc(span / lambda)`` is the exposure smearing; ``Z = |Z| exp(i theta)``
    is the complex fringe amplitude at the envelope peak.

    Parameters
    ----------
    intensity : array_like, shape (n_sample, *pixel_shape)
    opd, opd_span : array_like, broadcastable to ``intensity``, m
    wave, bandwidth, opd_centre : array_like, broadcastable to pixel_shape, m
    variance : array_like, broadcastable to ``intensity``, optional (weights 1/variance)
    max_opd : array_like, broadcastable to pixel_shape, m, optional -- only samples with
        ``|opd| <= max_opd`` are used

    Returns
    -------
    z : ndarray complex, pixel_shape -- fringe phasor (intensity unit)
    z_var : ndarray, pixel_shape -- variance of each of Re z and Im z (mean of the two)
    dc : ndarray, pixel_shape -- A0, the mean incoherent flux
    """
    y = np.asarray(intensity, float)
    pshape = y.shape[1:]
    n_s = y.shape[0]
    n_p = int(np.prod(pshape))

    # per-sample inputs stay broadcast views; each chunk of pixels is gathered on its own
    # (bounded memory: no full (sample, pixel) copy of the OPDs or spans)
    def per_sample(a):
        return None if a is None else np.broadcast_to(np.asarray(a, float), (n_s, *pshape))

    def per_pixel(a):
        return None if a is None else np.broadcast_to(np.asarray(a, float), pshape).reshape(-1)
    o, span, var = per_sample(opd), per_sample(opd_span), per_sample(variance)
    lam, bw, oc = per_pixel(wave), per_pixel(bandwidth), per_pixel(opd_centre)
    mo = per_pixel(max_opd)
    z = np.empty(n_p, complex)
    z_var, dc = np.empty(n_p), np.empty(n_p)
    chunk = max(1, 4_000_000 // (4 * n_s))
    for p0 in range(0, n_p, chunk):
        sl = slice(p0, min(n_p, p0 + chunk))
        idx = (slice(None),) + np.unravel_index(np.arange(sl.start, sl.stop), pshape)

        def take(a):
            return None if a is None else a[idx]
        z[sl], z_var[sl], dc[sl] = _phasor_chunk(
            y[idx], take(o), take(span), take(var), lam[sl], bw[sl], oc[sl],
            None if mo is None else mo[sl])
    return z.reshape(pshape), z_var.reshape(pshape), dc.reshape(pshape)


def _phasor_chunk(y, o, span, variance, lam, bw, oc, max_opd):
    n_s = y.shape[0]
    env = gaussian_envelope(o - oc, lam, bw)
    if span is not None:
        env = env * sinc(span / lam)
    c, s = cos_sin(2 * np.pi * o / lam)
    omax = np.maximum(np.abs(o).max(0), 1e-30)
    basis = np.stack([np.ones_like(o), o / omax, env * c, env * s], -1)
    w = np.ones_like(y) if variance is None else 1 / variance
    if max_opd is not None:
        w = w * (np.abs(o) <= max_opd)
    lhs = _weighted_gram(w, basis)
    rhs = _weighted_project(basis, w * y)
    cov = np.linalg.inv(lhs)
    sol = (cov @ rhs[..., None])[..., 0]
    if variance is None:       # scale by the residual variance
        res = y - np.einsum("spi,pi->sp", basis, sol)
        n_used = (w > 0).sum(0)
        cov = cov * (np.sum(w * res ** 2, 0) / np.maximum(n_used - 4, 1))[:, None, None]
    # Re[Z e^{-i ph}] = Re Z cos(ph) + Im Z sin(ph)
    return sol[:, 2] + 1j * sol[:, 3], 0.5 * (cov[:, 2, 2] + cov[:, 3, 3]), sol[:, 0]


def fit_dispersion_law(wave_measured, wave_err, *, deg: int = 3, clip: float = 4.0,
                       n_iter: int = 5):
    """Smooth per-trace law lambda(x): weighted polynomial with sigma clipping.

    Parameters
    ----------
    wave_measured, wave_err : array_like, shape (n_trace, n_x), m (NaN = no measurement)
    deg : int -- polynomial degree in ``(x - x_ref) / x_scale`` (lowest order first)
    clip : float -- rejection threshold in robust standard deviations (normalised residuals)

    Returns
    -------
    law : ndarray (n_trace, n_x), m -- the polynomial evaluated at every column
    coeffs : ndarray (n_trace, deg + 1), m
    used : ndarray (n_trace, n_x) bool -- measurements kept
    x_ref, x_scale : float, px
    """
    wm = np.asarray(wave_measured, float)
    we = np.asarray(wave_err, float)
    n_t, n_x = wm.shape
    x = np.arange(n_x, dtype=float)
    x_ref, x_scale = (n_x - 1) / 2, max((n_x - 1) / 2, 1.0)
    xs = (x - x_ref) / x_scale
    deg = min(deg, max(n_x - 2, 0))
    usable = np.isfinite(wm) & np.isfinite(we) & (we > 0)
    coeffs = np.full((n_t, deg + 1), np.nan)
    used = usable.copy()
    for k in range(n_t):          # loop over traces only; each a small fit
        u = usable[k].copy()
        for _ in range(n_iter):
            if u.sum() <= deg:
                raise ValueError(f"trace {k}: only {int(u.sum())} usable wavelength "
                                 f"measurements for a degree-{deg} law")
            coeffs[k] = npoly.polyfit(xs[u], wm[k, u], deg, w=1 / we[k, u])
            z = (wm[k] - npoly.polyval(xs, coeffs[k])) / we[k]
            scale = max(1.4826 * np.median(np.abs(z[u])), 1.0)
            new = usable[k] & (np.abs(z) < clip * scale)
            if np.array_equal(new, u):
                break
            u = new
        used[k] = u
    law = np.stack([npoly.polyval(xs, coeffs[k]) for k in range(n_t)])
    return law, coeffs, used, float(x_ref), float(x_scale)


def common_grid(wave_pixel, *, extrapolate_px: float = 0.5):
    """Common wavelength grid of a channel: the median over traces of each column's
    wavelength, trimmed to the range every trace covers (to within ``extrapolate_px``
    pixel steps, as ``pipeline.numerics.extraction.resample_to_grid`` allows).

    Parameters
    ----------
    wave_pixel : array_like, shape (n_trace, n_x), m, increasing along x
    extrapolate_px : float >= 0

    Returns
    -------
    grid : ndarray (n_wave,), m, n_wave <= n_x
    """
    wp = np.asarray(wave_pixel, float)
    g = np.median(wp, axis=0)
    if np.any(np.diff(g) <= 0):
        raise ValueError("median wavelength law is not increasing along x")
    e = float(extrapolate_px)
    lo = np.max(wp[:, 0] - e * (wp[:, 1] - wp[:, 0]))
    hi = np.min(wp[:, -1] + e * (wp[:, -1] - wp[:, -2]))
    return g[(g >= lo * (1 - 1e-12)) & (g <= hi * (1 + 1e-12))]


def baseline_bandwidth(wave_pixel, bandwidth_pixel, wave_grid, trace_baseline, trace_pol, *,
                       n_baseline: int, n_pol: int):
    """Effective FWHM bandwidth of each baseline's fringes on the common grid.

    A baseline's coherent flux is estimated from its outputs' traces, each resampled
    to the grid by linear interpolation between two pixels. Per trace and grid
    point the fringe envelope is that of the trace's own line-spread (FWHM ``b``,
    interpolated to the grid point) widened by the interpolation: weights 1 - a and
    a on pixels a wavelength step ``d`` apart add a (1 - a) d^2 to the bandpass
    variance (second moment of the two-point kernel), so FWHM^2 = b^2 + 8 ln 2 a (1 - a) d^2.
    The baseline's FWHM is the root mean square over its traces of one polarisation
    (the mean of Gaussian envelopes to second order in the path difference).

    Parameters
    ----------
    wave_pixel, bandwidth_pixel : array_like, shape (n_trace, n_x), m
    wave_grid : array_like, shape (n_wave,), m
    trace_baseline, trace_pol : array_like of int, shape (n_trace,)
    n_baseline, n_pol : int

    Returns
    -------
    ndarray, shape (n_pol, n_baseline, n_wave), m; NaN for a baseline without traces
    """
    wp = np.asarray(wave_pixel, float)
    bp = np.asarray(bandwidth_pixel, float)
    g = np.asarray(wave_grid, float)
    n_t, n_x = wp.shape
    fwhm2 = np.empty((n_t, g.size))
    for k in range(n_t):
        i = np.clip(np.searchsorted(wp[k], g) - 1, 0, n_x - 2)
        d = wp[k, i + 1] - wp[k, i]
        a = np.clip((g - wp[k, i]) / d, 0.0, 1.0)
        fwhm2[k] = np.interp(g, wp[k], bp[k]) ** 2 + 8 * np.log(2) * a * (1 - a) * d ** 2
    out = np.full((n_pol, n_baseline, g.size), np.nan)
    tb, tp = np.asarray(trace_baseline, int), np.asarray(trace_pol, int)
    for p in range(n_pol):
        for b in range(n_baseline):
            sel = (tb == b) & (tp == p)
            if sel.any():
                out[p, b] = np.sqrt(fwhm2[sel].mean(axis=0))
    return out
