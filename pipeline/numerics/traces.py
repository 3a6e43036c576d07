# SPDX-License-Identifier: BSD-3-Clause
"""Spectral traces on the science detector: centres, cross-profiles, pixel response.

Every output (or output and polarisation) of the combiner draws one spectrum
along x. Its cross-profile is modelled as a Gaussian of width ``sigma``
integrated over each pixel (unit sum over y), centred on ``y_k(x)``, a
low-order polynomial in x (tilt and curvature). The profiles feed optimal
extraction (Horne 1986, PASP 98, 609; ``pipeline.numerics.extraction``).

Axes: images are ``(y, x)``; per-trace quantities are ``(trace, x)``, with the
trace index ``output * n_pol + pol`` (DEVELOPERS.md). Pixels in px, fluxes in
whatever unit the image has (e- after dark subtraction, usually).

Mask policy: ``valid`` (True = usable pixel) excludes pixels from every fit;
NaN pixels raise unless masked.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.polynomial import polynomial as npoly
from scipy.special import erf

__all__ = ["TraceFit", "trace_profiles", "find_traces", "fit_amplitudes", "pixel_response",
           "detector_response", "combine_valid"]

_SQRT2 = np.sqrt(2.0)
_INV_SQRT_2PI = 1.0 / np.sqrt(2.0 * np.pi)


@dataclass(frozen=True)
class TraceFit:
    """Result of :func:`find_traces`.

    Attributes
    ----------
    trace_y : ndarray (trace, x), px -- smooth centre law evaluated at every column
    profile_sigma : ndarray (trace, x), px -- smooth Gaussian width (pixel-integrated model)
    centre_coeffs, sigma_coeffs : ndarray (trace, deg + 1) -- polynomial coefficients in
        ``(x - x_ref) / x_scale``, lowest order first (``numpy.polynomial.polynomial``)
    x_ref, x_scale : float, px
    centre_measured, sigma_measured, amplitude : ndarray (trace, x) -- per-column fit
    fit_used : ndarray (trace, x) bool -- columns kept in the polynomial fits
    centre_residual_rms : ndarray (trace,), px -- QC: RMS of measured minus law
    """
    trace_y: np.ndarray
    profile_sigma: np.ndarray
    centre_coeffs: np.ndarray
    sigma_coeffs: np.ndarray
    x_ref: float
    x_scale: float
    centre_measured: np.ndarray
    sigma_measured: np.ndarray
    amplitude: np.ndarray
    fit_used: np.ndarray
    centre_residual_rms: np.ndarray


def _pix_gauss_value(y, c, s):
    """Pixel-integrated unit Gaussian (the value of :func:`_pix_gauss` alone). Broadcasts."""
    up = (y + 0.5 - c) / s
    um = (y - 0.5 - c) / s
    return 0.5 * (erf(up / _SQRT2) - erf(um / _SQRT2))


def _pix_gauss(y, c, s):
    """Pixel-integrated unit Gaussian and its derivatives wrt c and s. Broadcasts."""
    up = (y + 0.5 - c) / s
    um = (y - 0.5 - c) / s
    p = 0.5 * (erf(up / _SQRT2) - erf(um / _SQRT2))
    gp = _INV_SQRT_2PI * np.exp(-0.5 * up * up)
    gm = _INV_SQRT_2PI * np.exp(-0.5 * um * um)
    dp_dc = (gm - gp) / s
    dp_ds = (um * gm - up * gp) / s
    return p, dp_dc, dp_ds


def trace_profiles(trace_y, profile_sigma, *, n_y: int) -> np.ndarray:
    """Normalised cross-profiles of every trace.

    Parameters
    ----------
    trace_y, profile_sigma : array_like, shape (n_trace, n_x), px
    n_y : int, detector rows

    Returns
    -------
    profiles : ndarray, shape (n_trace, n_y, n_x), float64
        Pixel-integrated Gaussian; sums to 1 over y for a trace far from the edges.
    """
    ty = np.asarray(trace_y, float)
    ts = np.asarray(profile_sigma, float)
    # Beyond 8.4 sigma from the centre both erf terms round to the same +-1 in float64
    # (erf(z) == 1 for z >= 5.93): the profile is exactly zero there. Each column is
    # evaluated on the rows within 9 sigma of its centre only, the rest left zero; the
    # result is identical to evaluating every row.
    if ty.size and np.isfinite(ty).all() and np.isfinite(ts).all() and (ts > 0).all():
        half = int(np.ceil(9 * ts.max() + 1))
        width = 2 * half + 1
        if width <= n_y // 2:
            start = np.clip(np.floor(ty) - half, 0, n_y - width).astype(int)   # (trace, x)
            rows = start[:, None, :] + np.arange(width)[None, :, None]           # (trace, W, x)
            out = np.zeros((ty.shape[0], n_y, ty.shape[1]))
            np.put_along_axis(out, rows, _pix_gauss_value(rows.astype(float), ty[:, None, :],
                                                          ts[:, None, :]), axis=1)
            return out
    y = np.arange(n_y, dtype=float)[None, :, None]
    return _pix_gauss_value(y, ty[:, None, :], ts[:, None, :])


def _check_image(image, valid, name="image"):
    image = np.asarray(image, float)
    if image.ndim != 2:
        raise ValueError(f"{name} must be 2-D (y, x), found shape {image.shape}")
    valid = np.ones(image.shape, bool) if valid is None else np.broadcast_to(
        np.asarray(valid, bool), image.shape)
    bad_nan = ~np.isfinite(image) & valid
    if bad_nan.any():
        raise ValueError(f"{name} has {int(bad_nan.sum())} non-finite pixels not excluded by "
                         "`valid`; mask them (valid=False) first")
    return np.where(valid, image, 0.0), valid


def _linear_amplitudes(image, valid, prof):
    """Amplitudes (trace, x) and background (x,) of fixed profiles (trace, y, x): joint
    linear least squares per column (all traces and a constant)."""
    n_y, n_x = image.shape
    n_t = prof.shape[0]
    p = prof.transpose(2, 1, 0)                                                # (x, y, k)
    jac = np.concatenate([p, np.ones((n_x, n_y, 1))], axis=2)
    jw = (jac * valid.T.astype(float)[:, :, None]).transpose(0, 2, 1)
    lhs, rhs = jw @ jac, (jw @ image.T[:, :, None])[..., 0]
    lhs += 1e-12 * np.trace(lhs, axis1=1, axis2=2)[:, None, None] * np.eye(n_t + 1)
    sol = np.linalg.solve(lhs, rhs[..., None])[..., 0]
    return sol[:, :n_t].T, sol[:, n_t]


def _column_fit(image, valid, c0, s0, *, n_iter=15, fit_shape=True):
    """Joint least-squares fit, column by column (vectorised over x), of
    background + sum_k a_k P(y; c_k, s_k). Returns a, c, s of shape (trace, x).

    With ``fit_shape`` False only the amplitudes and one background per column are
    solved (linear, all traces jointly). Otherwise each trace is fitted in a window
    of rows around it (amplitude, centre, width), all traces of a column jointly
    (Levenberg-Marquardt; neighbours couple through the rows their windows share,
    giving a block-tridiagonal system solved by the block Thomas algorithm), with
    one background per column re-estimated between iterations."""
    n_y, n_x = image.shape
    n_t = c0.shape[0]
    if not fit_shape:
        return _linear_amplitudes(image, valid, trace_profiles(c0, s0, n_y=n_y))[0], c0, s0
    c, s = c0.astype(float).copy(), s0.astype(float).copy()
    h = int(np.ceil(3.5 * max(float(np.max(s0)), 1.0)))
    offs = np.arange(-h, h + 1)
    xi = np.arange(n_x)[None, :, None]
    w_img = valid.astype(float)
    xx = np.broadcast_to(xi, (n_t, n_x, offs.size))

    def gather(arr, rows):
        return arr[np.clip(rows, 0, n_y - 1), xi]

    a = np.maximum(gather(image, np.rint(c)[..., None].astype(int))[..., 0], 0.0) \
        * np.sqrt(2 * np.pi) * s
    lam = 1e-3
    for _ in range(n_iter):
        base = np.rint(c).astype(int)
        rows = base[..., None] + offs                                # (trace, x, win)
        inside = (rows >= 0) & (rows < n_y)
        p, dc, ds = _pix_gauss(rows.astype(float), c[..., None], s[..., None])
        model_all = np.zeros((n_y, n_x))                             # traces in their windows
        np.add.at(model_all, (np.clip(rows, 0, n_y - 1), xx), a[..., None] * p * inside)
        bkg = np.sum(w_img * (image - model_all), 0) / np.maximum(w_img.sum(0), 1)
        res = gather(image - model_all - bkg[None, :], rows)
        w = gather(w_img, rows) * inside
        jac = np.stack([p, a[..., None] * dc, a[..., None] * ds], -1)  # (trace, x, win, 3)
        jw = jac * w[..., None]
        diag_blk = np.einsum("kxwi,kxwj->kxij", jw, jac)
        grad = np.einsum("kxwi,kxw->kxi", jw, res)
        # coupling of neighbours k, k+1 through the rows both windows cover
        shift = base[1:] - base[:-1]                                 # (trace-1, x)
        j_idx = np.arange(offs.size)[None, None, :] - shift[..., None]
        ok = (j_idx >= 0) & (j_idx < offs.size)
        jn = np.take_along_axis(jac[1:], np.clip(j_idx, 0, offs.size - 1)[..., None], axis=2)
        up_blk = np.einsum("kxwi,kxwj->kxij", jw[:-1], jn * ok[..., None])
        dd = np.einsum("kxii->kxi", diag_blk)
        diag_blk = diag_blk + (lam * dd + 1e-12 * dd.max(-1, keepdims=True) + 1e-300)[..., None] \
            * np.eye(3)
        step = _block_tridiagonal_solve(diag_blk, up_blk, grad)
        a = a + step[..., 0]
        c = c + np.clip(step[..., 1], -0.5, 0.5)
        s = np.clip(s + np.clip(step[..., 2], -0.3, 0.3), 0.3, 5.0)
    return a, c, s


def _block_tridiagonal_solve(diag, upper, rhs):
    """Solve a symmetric block-tridiagonal system (block Thomas algorithm), batched.

    diag (n, ..., m, m), upper (n-1, ..., m, m) (block k, k+1), rhs (n, ..., m)."""
    n = diag.shape[0]
    cp = [None] * n
    gp = [None] * n
    m_inv = np.linalg.inv(diag[0])
    gp[0] = (m_inv @ rhs[0][..., None])[..., 0]
    if n > 1:
        cp[0] = m_inv @ upper[0]
    for k in range(1, n):
        lo = np.swapaxes(upper[k - 1], -1, -2)
        m_inv = np.linalg.inv(diag[k] - lo @ cp[k - 1])
        gp[k] = (m_inv @ (rhs[k] - (lo @ gp[k - 1][..., None])[..., 0])[..., None])[..., 0]
        if k < n - 1:
            cp[k] = m_inv @ upper[k]
    out = np.empty_like(rhs)
    out[n - 1] = gp[n - 1]
    for k in range(n - 2, -1, -1):
        out[k] = gp[k] - (cp[k] @ out[k + 1][..., None])[..., 0]
    return out


def _robust_polyfit(x, values, weights, deg, *, clip=4.0, n_iter=4):
    """Weighted polynomial fit per row with sigma clipping. x (n,), values (t, n)."""
    n_t = values.shape[0]
    coeffs = np.zeros((n_t, deg + 1))
    used = weights > 0
    for k in range(n_t):      # loop over traces only (<= 48), each a tiny fit
        u = used[k].copy()
        for _ in range(n_iter):
            if u.sum() <= deg:
                break
            coeffs[k] = npoly.polyfit(x[u], values[k, u], deg, w=np.sqrt(weights[k, u]))
            res = values[k] - npoly.polyval(x, coeffs[k])
            scale = 1.4826 * np.median(np.abs(res[u])) + 1e-6
            new = used[k] & (np.abs(res) < clip * scale)
            if np.array_equal(new, u):
                break
            u = new
        used[k] = u
    return coeffs, used


def find_traces(flat, nominal_y, *, valid=None, nominal_sigma: float = 1.0,
                centre_deg: int = 2, sigma_deg: int = 2, min_snr: float = 10.0,
                read_noise: float = 0.0) -> TraceFit:
    """Locate every trace of a lamp flat and measure its cross-profile.

    Each column is fitted jointly (neighbouring traces overlap in split
    polarisation) with a constant background plus one pixel-integrated
    Gaussian per trace (Levenberg-Marquardt, vectorised over columns); the
    centres and widths are then smoothed by polynomials in x with sigma clipping.

    Parameters
    ----------
    flat : array_like, shape (n_y, n_x), dark-subtracted lamp flat (e- or ADU)
    nominal_y : array_like, shape (n_trace,), px -- nominal centres (first guess),
        increasing; the traces may be offset from them by up to ~1/3 of the spacing
    valid : array_like of bool, shape (n_y, n_x), optional -- True = usable pixel
    nominal_sigma : float, px -- first guess of the Gaussian width
    centre_deg, sigma_deg : int -- polynomial degrees of y_k(x) and sigma_k(x)
    min_snr : float -- columns whose amplitude is below ``min_snr`` times its noise
        estimate are left out of the polynomial fits
    read_noise : float, same unit as ``flat`` -- for the amplitude noise estimate

    Returns
    -------
    TraceFit

    Raises
    ------
    ValueError
        If the image has unmasked NaNs, or a trace has too few usable columns.
    """
    image, valid = _check_image(flat, valid, "flat")
    n_y, n_x = image.shape
    nominal_y = np.asarray(nominal_y, float)
    n_t = nominal_y.size
    spacing = np.min(np.diff(nominal_y)) if n_t > 1 else 8.0
    # Coarse step: one global offset per trace from the x-median profile's centroid.
    yy = np.arange(n_y, dtype=float)
    prof = np.median(np.where(valid, image, np.nan), axis=1)
    prof = np.nan_to_num(prof - np.nanmin(prof))
    half = spacing / 2
    c0 = np.empty(n_t)
    for k, yk in enumerate(nominal_y):   # per trace, a 1-D centroid
        sel = np.abs(yy - yk) < half
        wk = prof[sel]
        c0[k] = np.sum(wk * yy[sel]) / wk.sum() if wk.sum() > 0 else yk
    c_init = np.repeat(c0[:, None], n_x, axis=1)
    s_init = np.full((n_t, n_x), float(nominal_sigma))
    a, c, s = _column_fit(image, valid, c_init, s_init)
    # Noise of the amplitude ~ sqrt(a * few px + read noise^2 * few px): common practice.
    noise = np.sqrt(np.abs(a) * 2.5 * s + 5 * s * read_noise ** 2 + 1e-12)
    weight = np.where((a > min_snr * noise) & np.isfinite(c) & np.isfinite(s),
                      (a / noise) ** 2, 0.0)
    # a column whose fit ran away (blended neighbours) can claim a huge amplitude:
    # cap every weight at 4 x the trace's median so that no column dominates
    med = np.array([np.median(wk[wk > 0]) if np.any(wk > 0) else 0.0 for wk in weight])
    weight = np.minimum(weight, 4 * med[:, None])
    x = np.arange(n_x, dtype=float)
    x_ref, x_scale = (n_x - 1) / 2, max((n_x - 1) / 2, 1.0)
    xs = (x - x_ref) / x_scale
    if np.any((weight > 0).sum(axis=1) <= max(centre_deg, sigma_deg)):
        bad = np.flatnonzero((weight > 0).sum(axis=1) <= max(centre_deg, sigma_deg))
        raise ValueError(f"traces {bad.tolist()} have too few columns with signal "
                         f"(amplitude > {min_snr} x noise) to fit their position")
    cc, used = _robust_polyfit(xs, c, weight, centre_deg)
    sc, used_s = _robust_polyfit(xs, s, np.where(used, weight, 0.0), sigma_deg)
    # the laws fitted to the whole image, from the per-column centres and the nominal
    # width (per-column widths of blended neighbours are too poorly determined to start from)
    sc0 = np.zeros_like(sc)
    sc0[:, 0] = nominal_sigma
    cc, sc = _refine_laws(image, valid, xs, cc, sc0, lit=weight > 0)
    trace_y = np.stack([npoly.polyval(xs, cc[k]) for k in range(n_t)])
    sigma = np.stack([npoly.polyval(xs, sc[k]) for k in range(n_t)])
    res = np.where(used, c - trace_y, np.nan)
    rms = np.sqrt(np.nanmean(res ** 2, axis=1))
    return TraceFit(trace_y=trace_y, profile_sigma=sigma, centre_coeffs=cc, sigma_coeffs=sc,
                    x_ref=float(x_ref), x_scale=float(x_scale), centre_measured=c,
                    sigma_measured=s, amplitude=a, fit_used=used, centre_residual_rms=rms)


def _refine_laws(image, valid, xs, cc, sc, *, lit, n_iter=12):
    """Fit the polynomial laws of centre and width directly to the image (all columns
    at once), alternating a joint linear solve of the per-column amplitudes with a
    Levenberg-Marquardt step of the coefficients. Blended neighbours (split
    polarisation) are badly determined column by column; the laws are not.
    Coefficient blocks of neighbouring traces couple: block-tridiagonal solve."""
    n_y, n_x = image.shape
    n_t, nc = cc.shape[0], cc.shape[1]
    basis_c = np.stack([xs ** j for j in range(nc)], -1)               # (x, nc)
    basis_s = np.stack([xs ** j for j in range(sc.shape[1])], -1)
    h = int(np.ceil(3.5 * max(float(np.max(npoly.polyval(xs, sc.T))), 1.0)))
    offs = np.arange(-h, h + 1)
    xi = np.arange(n_x)[None, :, None]
    w_img = valid.astype(float)
    lam = 1e-3
    for _ in range(n_iter):
        c = np.stack([npoly.polyval(xs, cc[k]) for k in range(n_t)])
        sg = np.stack([npoly.polyval(xs, sc[k]) for k in range(n_t)])
        a, model = fit_amplitudes(image, c, sg, valid=valid)
        a = np.where(lit, a, 0.0)                                      # dark columns: no pull
        base = np.rint(c).astype(int)
        rows = base[..., None] + offs
        inside = (rows >= 0) & (rows < n_y)
        r = np.clip(rows, 0, n_y - 1)
        p, dc, ds = _pix_gauss(rows.astype(float), c[..., None], sg[..., None])
        res = (image - model)[r, xi]
        w = w_img[r, xi] * inside
        jc = (a[..., None] * dc)[..., None] * basis_c[None, :, None, :]  # (trace, x, win, nc)
        js = (a[..., None] * ds)[..., None] * basis_s[None, :, None, :]
        jac = np.concatenate([jc, js], -1)
        jw = jac * w[..., None]
        diag_blk = np.einsum("kxwi,kxwj->kij", jw, jac)
        grad = np.einsum("kxwi,kxw->ki", jw, res)
        shift = base[1:] - base[:-1]
        j_idx = np.arange(offs.size)[None, None, :] - shift[..., None]
        ok = (j_idx >= 0) & (j_idx < offs.size)
        jn = np.take_along_axis(jac[1:], np.clip(j_idx, 0, offs.size - 1)[..., None], axis=2)
        up_blk = np.einsum("kxwi,kxwj->kij", jw[:-1], jn * ok[..., None])
        dd = np.einsum("kii->ki", diag_blk)
        diag_blk = diag_blk + (lam * dd + 1e-12 * dd.max(-1, keepdims=True) + 1e-300)[..., None] \
            * np.eye(jac.shape[-1])
        step = _block_tridiagonal_solve(diag_blk, up_blk, grad)
        # trust region: at most 0.1 px of centre and 5% of width per iteration
        dcen = np.abs(step[:, :nc] @ basis_c.T).max(1)
        dsig = (np.abs(step[:, nc:] @ basis_s.T) / sg).max(1)
        scale = np.minimum(1.0, np.minimum(0.1 / np.maximum(dcen, 1e-12),
                                           0.05 / np.maximum(dsig, 1e-12)))
        cc = cc + scale[:, None] * step[:, :nc]
        sc = sc + scale[:, None] * step[:, nc:]
    return cc, sc


def fit_amplitudes(image, trace_y, profile_sigma, *, valid=None):
    """Per-column amplitudes of fixed trace profiles (joint linear least squares
    with a constant background per column).

    Parameters
    ----------
    image : array_like, shape (n_y, n_x)
    trace_y, profile_sigma : array_like, shape (n_trace, n_x), px
    valid : array_like of bool, shape (n_y, n_x), optional

    Returns
    -------
    amplitude : ndarray (n_trace, n_x) -- flux of each trace per column (image unit)
    model : ndarray (n_y, n_x) -- background + sum of profiles x amplitudes
    """
    image, valid = _check_image(image, valid)
    ty, ts = np.asarray(trace_y, float), np.asarray(profile_sigma, float)
    prof = trace_profiles(ty, ts, n_y=image.shape[0])
    a, _ = _linear_amplitudes(image, valid, prof)
    model_tr = np.einsum("kyx,kx->yx", prof, a)
    # background: the least-squares constant of the same fit, recovered from the residual
    w = valid.astype(float)
    bkg = np.sum(w * (image - model_tr), axis=0) / np.maximum(w.sum(axis=0), 1)
    return a, model_tr + bkg[None, :]


def _window_correction(residual, trace_y, profile_sigma, prof, valid, *,
                       half_width_sigma=3.0):
    """Per-column amplitude correction (n_trace, n_x) that turns a profile-fitted
    amplitude into the flux actually collected within the trace's window.

    A least-squares amplitude with a slightly wrong profile width is biased by about
    half the relative width error (a 1% width error: 0.5% flux), differently in every
    trace; the window flux ``sum(image) / sum(profile)`` over rows within
    ``half_width_sigma`` widths depends on the profile only through its far tails. Here
    it is computed as the fitted amplitude plus the window sum of the residual (image
    minus every trace's fitted profile) over the window sum of the profile ``prof``
    (trace, y, x), which removes the neighbours' share."""
    ty, ts = np.asarray(trace_y, float), np.asarray(profile_sigma, float)
    n_y = residual.shape[0]
    y = np.arange(n_y, dtype=float)[None, :, None]
    gap = np.full(ty.shape, np.inf)
    if ty.shape[0] > 1:
        order = np.argsort(ty, axis=0)
        srt = np.take_along_axis(ty, order, axis=0)
        d = np.diff(srt, axis=0)
        near = np.minimum(np.vstack([d, np.full((1, ty.shape[1]), np.inf)]),
                          np.vstack([np.full((1, ty.shape[1]), np.inf), d]))
        np.put_along_axis(gap, order, near, axis=0)
    # only isolated traces: where neighbours overlap (split polarisation), their
    # profile-fitted tails, wrong in the same way, would leak into the window and
    # over-correct; there the least-squares amplitude is kept
    isolated = gap / 2 >= half_width_sigma * ts
    half = (half_width_sigma * ts)[:, None, :]                                   # (k, 1, x)
    win = (np.abs(y - ty[:, None, :]) <= half) & np.asarray(valid, bool)[None]   # (k, y, x)
    norm = np.sum(prof * win, axis=1)
    corr = np.sum(residual[None] * win, axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(isolated & (norm > 0.5), corr / norm, 0.0)


def pixel_response(flat, trace_y, profile_sigma, *, valid=None, min_fraction: float = 0.05,
                   smooth_deg: int | None = None):
    """Pixel response (flat field) = lamp flat / smooth model of the traces.

    Without ``smooth_deg`` the model is :func:`fit_amplitudes`' own (profiles times
    their per-column least-squares amplitudes plus a constant), so the response holds
    only the pixel-to-pixel structure within each column. With ``smooth_deg`` the
    per-column amplitudes are first corrected to the flux within each trace's window
    (a slightly wrong profile width then does not bias a trace's throughput) and
    smoothed along x by a polynomial of that degree per trace; the model is the
    profiles times those, and the response also carries each column's mean response,
    which extraction then removes from the spectra. The response is the ratio where the
    model exceeds ``min_fraction`` of its column maximum, and exactly 1 elsewhere (too
    little light to measure; such pixels carry no weight in optimal extraction).
    The returned lamp spectrum is the window-corrected amplitude (smoothed if asked).

    Parameters
    ----------
    flat : array_like, shape (n_y, n_x), dark-subtracted lamp flat
    trace_y, profile_sigma : array_like, shape (n_trace, n_x), px
    valid : array_like of bool, shape (n_y, n_x), optional
    min_fraction : float in (0, 1)
    smooth_deg : int or None -- degree of the smoothing polynomial in x (None: none)

    Returns
    -------
    response : ndarray (n_y, n_x), dimensionless, 1 on average within traces
    lamp_spectrum : ndarray (n_trace, n_x) -- the (smoothed) amplitudes (flat unit)
    """
    image, valid = _check_image(flat, valid, "flat")
    amp, model = fit_amplitudes(image, trace_y, profile_sigma, valid=valid)
    # the flat is dark subtracted: its true background is zero, and the fitted constant
    # only soaks up profile-shape errors, so the window flux is taken without it
    prof = trace_profiles(trace_y, profile_sigma, n_y=image.shape[0])
    traces_only = np.einsum("kyx,kx->yx", prof, amp)
    amp = amp + _window_correction(image - traces_only, trace_y, profile_sigma, prof, valid)
    if smooth_deg is not None:
        n_x = image.shape[1]
        xs = (np.arange(n_x) - (n_x - 1) / 2) / max((n_x - 1) / 2, 1)
        w = np.where(amp > 0, 1.0, 0.0)
        coeffs, _ = _robust_polyfit(xs, amp, w, min(smooth_deg, n_x - 2))
        smooth = np.stack([npoly.polyval(xs, c) for c in coeffs])
        model = np.einsum("kyx,kx->yx", prof, smooth)    # no background: dark-subtracted flat
        amp = smooth
    lit = (model > min_fraction * model.max(axis=0, keepdims=True)) & valid & (model > 0)
    response = np.ones_like(image)
    np.divide(image, model, out=response, where=lit)
    return response, amp


def detector_response(image, *, valid=None, deg: int = 2, clip: float = 5.0, n_iter: int = 4):
    """Pixel response from a detector flat (the detector lit directly, no traces).

    The illumination is smooth: a 2-D polynomial of total degree ``deg`` in scaled
    (y, x), fitted by least squares with iterative ``clip``-sigma rejection (hot,
    dead and cosmic-hit pixels), divides the image; what is left is each pixel's
    response, 1 on average.

    Parameters
    ----------
    image : array_like, shape (n_y, n_x), dark-subtracted mean detector flat
    valid : array_like of bool, shape (n_y, n_x), optional
    deg : int >= 0; clip : float > 0; n_iter : int >= 1

    Returns
    -------
    response : ndarray (n_y, n_x), NaN where ``valid`` is False
    illumination : ndarray (n_y, n_x), the fitted smooth illumination
    """
    image, valid = _check_image(image, valid, "detector flat")
    n_y, n_x = image.shape
    yy, xx = np.meshgrid(np.linspace(-1, 1, n_y), np.linspace(-1, 1, n_x), indexing="ij")
    terms = [yy ** i * xx ** j for i in range(deg + 1) for j in range(deg + 1 - i)]
    design = np.stack([t.ravel() for t in terms], axis=1)               # (pixel, term)
    z = image.ravel()
    use = valid.ravel().copy()
    for _ in range(max(n_iter, 1)):
        coef = np.linalg.lstsq(design[use], z[use], rcond=None)[0]
        model = design @ coef
        rel = z / np.where(model > 0, model, np.nan) - 1
        scatter = 1.4826 * np.nanmedian(np.abs(rel[use] - np.nanmedian(rel[use])))
        new = valid.ravel() & (np.abs(rel) <= clip * max(scatter, 1e-12))
        if np.array_equal(new, use):
            break
        use = new
    illum = model.reshape(n_y, n_x)
    with np.errstate(invalid="ignore", divide="ignore"):
        response = np.where(valid & (illum > 0), image / illum, np.nan)
    return response, illum


def combine_valid(dark_valid, response, *, flat_saturated=None, response_range=(0.5, 1.5)):
    """Bad-pixel mask of the science detector (True = usable).

    A pixel is usable if the dark stage kept it, its response is finite and
    within ``response_range``, and it was not saturated in the flat.

    Parameters
    ----------
    dark_valid : array_like of bool, shape (n_y, n_x)
    response : array_like, shape (n_y, n_x)
    flat_saturated : array_like of bool, shape (n_y, n_x), optional
    response_range : (float, float)

    Returns
    -------
    valid : ndarray of bool, shape (n_y, n_x)
    """
    r = np.asarray(response, float)
    lo, hi = response_range
    ok = np.asarray(dark_valid, bool) & np.isfinite(r) & (r >= lo) & (r <= hi)
    if flat_saturated is not None:
        ok &= ~np.asarray(flat_saturated, bool)
    return ok
