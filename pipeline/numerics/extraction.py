# SPDX-License-Identifier: BSD-3-Clause
"""Optimal extraction of the science traces and resampling to a common wavelength grid.

Optimal extraction (Horne 1986, PASP 98, 609): in each detector column the data
are modelled as ``D(y) = sum_k f_k P_k(y)`` with known normalised profiles
``P_k`` (``pipeline.numerics.traces.trace_profiles``) and per-pixel variance
``V = read_noise^2 + max(model, 0)`` (e-, Poisson + read noise, revised from the
model rather than the data, as Horne recommends). The fluxes are the
inverse-variance weighted least-squares solution; neighbouring traces (4 px apart
in split polarisation) are solved jointly, which reduces to Horne's formula
``f = sum(P D / V) / sum(P^2 / V)`` when the traces do not overlap. Pixels
deviating by more than ``clip`` standard deviations from the model (cosmic rays)
are rejected, the worst one per column at each iteration (Horne's rule), and the
fit repeated.

Axes: frames ``(frame, y, x)`` in e- (dark subtracted, divided by the pixel
response); profiles ``(trace, y, x)``; results ``(frame, trace, x)``.

Cost: each trace is fitted on the rows where its profile exceeds 1e-7 of its peak (a
window of ~12 rows for a 1-pixel profile), not on the whole column, whenever the
profiles are that compact and traces three apart do not overlap; otherwise every
row of the column is used. The answers agree to ~1e-7. Outliers are sought among the
windows' pixels: a cosmic ray far from every trace carries no weight and is left.

Mask and NaN policy: ``valid`` (True = usable; bad pixels *and* saturated pixels
must be False) removes pixels from the fit. NaN pixels raise with
``nan_policy="raise"`` (default) or are treated as invalid with ``"mask"``. A
trace whose usable pixels in a column carry less than ``min_coverage`` of its
profile gets flux and variance NaN and ``valid`` False.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

__all__ = ["Extracted", "optimal_extract", "resample_to_grid", "FixedWeightExtractor",
           "fixed_weight_extractor", "apply_fixed_weights"]


@dataclass(frozen=True)
class Extracted:
    """Result of :func:`optimal_extract`.

    Attributes
    ----------
    flux : ndarray (frame, trace, x), e- per frame and column (NaN where not valid)
    variance : ndarray (frame, trace, x), e-^2
    valid : ndarray (frame, trace, x), bool
    n_rejected : ndarray (frame,), int -- pixels rejected as outliers (cosmic rays)
    """
    flux: np.ndarray
    variance: np.ndarray
    valid: np.ndarray
    n_rejected: np.ndarray


def _solve_banded(diag_sums, rhs, n_sweep=12):
    """Solve the symmetric, diagonally dominant banded normal equations (offsets 0, 1, 2
    between traces) by Jacobi sweeps, vectorised over columns and frames.

    diag_sums: list of (x, trace, frame) for offsets 0, 1, 2; rhs (x, trace, frame).
    Returns the solution and the diagonal of the inverse to second order in the
    off-diagonal terms (exact when the traces do not overlap), both (frame, trace, x).
    Neighbouring traces 4 px apart with 1 px Gaussian profiles couple at the ~2-4%
    level, so each sweep gains more than a decade."""
    a0, a1, a2 = diag_sums

    def offdiag_times(f):
        out = np.zeros_like(f)
        for d, ad in ((1, a1), (2, a2)):
            out[:, :-d] += ad[:, :-d] * f[:, d:]
            out[:, d:] += ad[:, :-d] * f[:, :-d]
        return out

    # Jacobi converges as rho^n, rho the largest off-diagonal row sum over the diagonal:
    # sweep until rho^n < 1e-13 (isolated traces: one or two sweeps), at most n_sweep
    off = (np.abs(a1) + np.abs(a2) + np.pad(np.abs(a1), ((0, 0), (1, 0), (0, 0)))[:, :-1]
           + np.pad(np.abs(a2), ((0, 0), (2, 0), (0, 0)))[:, :-2])
    rho = float(np.max(off / np.abs(a0)))
    n = n_sweep if rho >= 1 else int(np.clip(np.ceil(-13 / np.log10(max(rho, 1e-300))),
                                             1, n_sweep))
    f = rhs / a0
    for _ in range(n):
        f = (rhs - offdiag_times(f)) / a0
    inv0 = 1.0 / a0
    second = np.zeros_like(a0)
    for d, ad in ((1, a1), (2, a2)):
        second[:, :-d] += ad[:, :-d] ** 2 * inv0[:, d:]
        second[:, d:] += ad[:, :-d] ** 2 * inv0[:, :-d]
    var = inv0 + inv0 ** 2 * second
    return f.transpose(2, 1, 0), var.transpose(2, 1, 0)


def _solve_covered(sums, rhs, cover, min_coverage):
    """Banded solve of the normal equations (``sums``: offsets 0, 1, 2; ``rhs``; all
    (x, trace, frame)) for the traces whose usable profile sum ``cover`` reaches
    ``min_coverage``; the others are decoupled and flagged. Returns flux, diagonal
    variance (frame, trace, x) and the coverage flags (x, trace, frame)."""
    good = cover >= min_coverage
    sums = [np.where(good, sums[0], 1.0)] + [
        np.where(good & np.roll(good, -s, axis=1), sums[s], 0.0) for s in (1, 2)]
    flux, ivar_diag = _solve_banded(sums, np.where(good, rhs, 0.0))
    return flux, ivar_diag, good


def _fit_dense(d, ok, rn2, prof, window, *, clip, n_iter, min_coverage):
    """Every trace against every row of each column (any profile shape).
    Returns flux, diagonal variance (frame, trace, x), coverage flags (x, trace, frame)
    and rejections per frame."""
    n_f, n_y, n_x = d.shape
    n_t = prof.shape[0]
    pt = prof.transpose(2, 0, 1)                                        # (x, trace, y)
    pp = [pt * pt]
    for s in (1, 2):
        q = np.zeros_like(pt)
        q[:, : n_t - s] = pt[:, : n_t - s] * pt[:, s:]
        pp.append(q)
    dt = d.transpose(2, 1, 0)                                           # (x, y, frame)
    var = (rn2[None] + np.maximum(d, 0.0)).transpose(2, 1, 0)
    okt = ok.transpose(2, 1, 0)
    n_rej = np.zeros(n_f, int)
    for it in range(n_iter):
        w = np.where(okt, 1.0 / var, 0.0)
        sums = [m @ w for m in pp]                                      # (x, trace, frame)
        cover = pt @ okt.astype(float)                                  # usable profile sum
        flux, ivar_diag, good = _solve_covered(sums, pt @ (dt * w), cover, min_coverage)
        model = pt.transpose(0, 2, 1) @ flux.transpose(2, 1, 0)         # (x, y, frame)
        var = rn2.T[:, :, None] + np.maximum(model, 0.0)
        if it < n_iter - 1:
            # Horne's rule: reject at most the worst pixel per column and iteration
            z2 = np.where(okt, (dt - model) ** 2 / var, 0.0)
            worst = np.argmax(z2, axis=1)[:, None, :]                   # (x, 1, frame)
            bad = np.zeros_like(okt)
            np.put_along_axis(bad, worst, np.take_along_axis(z2, worst, 1) > clip ** 2, 1)
            n_rej += bad.sum(axis=(0, 1))
            okt = okt & ~bad
    return flux, ivar_diag, good, n_rej


def _trace_windows(prof, *, rel_floor=1e-7, max_fraction=0.5):
    """Rows (trace, x, H) holding each trace's profile wherever it exceeds ``rel_floor``
    of its column peak (H the longest such support), or None where windows do not pay
    or do not apply: supports longer than ``max_fraction`` of the column, or traces
    three places apart that still overlap (the banded solve couples two neighbours)."""
    n_t, n_y, n_x = prof.shape
    peak = prof.max(axis=1, keepdims=True)
    inside = prof > rel_floor * np.where(peak > 0, peak, 1.0)
    if not inside.any(axis=1).all():
        return None
    first = np.argmax(inside, axis=1)                                   # (trace, x)
    last = n_y - 1 - np.argmax(inside[:, ::-1], axis=1)
    h = int((last - first).max()) + 1
    if h > max_fraction * n_y:
        return None
    if n_t > 3:
        overlap = np.einsum("tyx,tyx->tx", prof[:-3], prof[3:])
        if np.any(overlap > rel_floor * np.einsum("tyx,tyx->tx", prof, prof).max()):
            return None
    y0 = np.clip(first, 0, n_y - h)
    return y0[:, :, None] + np.arange(h)                                # (trace, x, H)


def _fit_windowed(d, ok, rn2, prof, rows, *, clip, n_iter, min_coverage):
    """As :func:`_fit_dense`, each trace fitted on its own rows only (``rows`` from
    :func:`_trace_windows`): the same normal equations, the profile products outside a
    trace's support being zero, at a fraction of the cost. Outliers are sought among
    the pixels of the windows."""
    n_f, n_y, n_x = d.shape
    n_t = prof.shape[0]
    tt = np.arange(n_t)[:, None, None]
    xx = np.arange(n_x)[None, :, None]
    yx = rows.transpose(1, 0, 2)                                        # (x, trace, H)
    xi = np.arange(n_x)[:, None, None]

    def on_rows(k):                  # profile of trace t + k on trace t's rows, (x, t, H)
        out = np.zeros(yx.shape)
        lo, hi = max(0, -k), min(n_t, n_t - k)
        if hi > lo:
            out[:, lo:hi] = prof[tt[lo + k:hi + k], rows[lo:hi], xx].transpose(1, 0, 2)
        return out
    near = {k: on_rows(k) for k in (-2, -1, 0, 1, 2)}
    pw = near[0]
    stack = np.stack([near[k] for k in (-2, -1, 0, 1, 2)], axis=-1)     # (x, t, H, 5)
    # the normal equations' profile products (offsets 0, 1, 2) and the profile, (x, t, 4, H):
    # each iteration's four weighted sums over a window are one batched product
    prods = np.stack([pw * near[s] for s in (0, 1, 2)] + [pw], axis=2)
    pw_row = pw[:, :, None, :]                                          # (x, t, 1, H)
    dt = d.transpose(2, 1, 0)                                           # (x, y, frame)
    dw = dt[xi, yx]                                                     # (x, trace, H, frame)
    rn2w = rn2.T[xi, yx][..., None]
    okt = ok.transpose(2, 1, 0).copy()
    okw = okt[xi, yx]
    varw = rn2w + np.maximum(dw, 0.0)
    n_rej = np.zeros(n_f, int)
    for it in range(n_iter):
        w = np.where(okw, 1.0 / varw, 0.0)
        s4 = prods @ w                                                  # (x, t, 4, frame)
        cover = (pw_row @ okw.astype(float))[:, :, 0]
        rhs = (pw_row @ (dw * w))[:, :, 0]
        flux, ivar_diag, good = _solve_covered([s4[:, :, 0], s4[:, :, 1], s4[:, :, 2]], rhs,
                                               cover, min_coverage)
        fx = np.pad(flux.transpose(2, 1, 0), ((0, 0), (2, 2), (0, 0)))  # (x, trace+4, frame)
        nb = np.stack([fx[:, 2 + k:2 + k + n_t] for k in (-2, -1, 0, 1, 2)], axis=2)
        model = stack @ nb                                 # (x, t, H, 5) @ (x, t, 5, frame)
        varw = rn2w + np.maximum(model, 0.0)
        if it < n_iter - 1:
            # Horne's rule: reject at most the worst pixel per column and iteration
            z2 = dw - model
            z2 *= z2
            z2 /= varw
            np.copyto(z2, 0.0, where=~okw)
            flat = z2.reshape(n_x, -1, n_f)
            worst = np.argmax(flat, axis=1)                             # (x, frame)
            zmax = np.take_along_axis(flat, worst[:, None], 1)[:, 0]
            row = yx.reshape(n_x, -1)[np.arange(n_x)[:, None], worst]   # (x, frame)
            hit = zmax > clip ** 2
            fx_, ff_ = np.nonzero(hit)
            okt[fx_, row[hit], ff_] = False
            n_rej += hit.sum(axis=0)
            okw = okt[xi, yx]
    return flux, ivar_diag, good, n_rej


def optimal_extract(frames, profiles, *, read_noise, valid=None, clip: float = 6.0,
                    n_iter: int = 4, min_coverage: float = 0.5,
                    nan_policy: Literal["raise", "mask"] = "raise") -> Extracted:
    """Optimal (profile-weighted) extraction of every trace in a stack of frames.

    Parameters
    ----------
    frames : array_like, shape (n_frame, n_y, n_x), e-
        Dark-subtracted frames divided by the pixel response. Pass a chunk of
        frames at a time (memory ~ n_frame * n_x * n_trace^2 * 8 bytes).
    profiles : array_like, shape (n_trace, n_y, n_x)
        Normalised cross-profiles (unit sum over y).
    read_noise : float or array_like broadcastable to (n_y, n_x), e-
    valid : array_like of bool, broadcastable to (n_frame, n_y, n_x), optional
        True = usable (exclude bad pixels and saturated pixels here).
    clip : float -- outlier rejection threshold in standard deviations (> 3)
    n_iter : int -- fits (the first with the data variance, then model variance)
    min_coverage : float in (0, 1] -- minimum usable profile fraction per column
    nan_policy : "raise" or "mask"

    Returns
    -------
    Extracted

    References
    ----------
    Horne, K. 1986, PASP 98, 609 -- "An optimal extraction algorithm for CCD spectroscopy".
    """
    if nan_policy not in ("raise", "mask"):
        raise ValueError(f"nan_policy must be 'raise' or 'mask', found {nan_policy!r}")
    if clip <= 3 or n_iter < 1 or not 0 < min_coverage <= 1:
        raise ValueError("need clip > 3, n_iter >= 1 and 0 < min_coverage <= 1")
    d = np.asarray(frames, float)
    if d.ndim != 3:
        raise ValueError(f"frames must be (frame, y, x), found shape {d.shape}")
    prof = np.asarray(profiles, float)
    if prof.shape[1:] != d.shape[1:]:
        raise ValueError(f"profiles {prof.shape} do not match frames {d.shape} in (y, x)")
    ok = np.ones(d.shape, bool) if valid is None else np.broadcast_to(
        np.asarray(valid, bool), d.shape).copy()
    finite = np.isfinite(d)
    if not finite[ok].all():
        if nan_policy == "raise":
            raise ValueError(f"frames have {int((~finite & ok).sum())} non-finite usable "
                             "pixels; set valid=False there or use nan_policy='mask'")
        ok &= finite
    d = np.where(ok, d, 0.0)
    rn2 = np.broadcast_to(np.asarray(read_noise, float) ** 2, d.shape[1:])
    window = _trace_windows(prof)
    fit = _fit_windowed if window is not None else _fit_dense
    flux, ivar_diag, good, n_rej = fit(d, ok, rn2, prof, window, clip=clip, n_iter=n_iter,
                                       min_coverage=min_coverage)
    good_f = good.transpose(2, 1, 0)
    flux = np.where(good_f, flux, np.nan)
    ivar_diag = np.where(good_f, ivar_diag, np.nan)
    return Extracted(flux=flux, variance=ivar_diag, valid=good_f, n_rejected=n_rej)


def resample_to_grid(spectra, variance, wave_pixel, wave_grid, *, extrapolate_px: float = 0.5):
    """Linear interpolation in wavelength of per-trace spectra onto a common grid.

    Each trace k has its own wavelength law ``wave_pixel[k]`` (increasing with x).
    Per-pixel values are first divided by the trace's own dispersion
    ``d_i = d lambda / dx`` (m per pixel, ``numpy.gradient`` of the law), making them
    spectral densities, which agree between traces of different dispersion; a grid
    point between pixels i and i+1 then gets ``((1 - a) s_i / d_i + a s_{i+1} / d_{i+1})
    * dg`` with ``a = (g - w_i) / (w_{i+1} - w_i)`` and ``dg`` the local grid step, i.e.
    the value per grid step (same unit as the input when the grid step is close to the
    pixel step), and variance ``((1 - a)^2 v_i / d_i^2 + a^2 v_{i+1} / d_{i+1}^2) dg^2``
    (pixels taken as independent; the covariance this creates between neighbouring
    grid points is not kept). Grid points up to ``extrapolate_px`` pixel steps
    beyond a trace's first or last pixel are extrapolated linearly from the two
    edge pixels; farther ones, and those next to a NaN pixel, are NaN.

    Parameters
    ----------
    spectra, variance : array_like, shape (..., n_trace, n_x)
    wave_pixel : array_like, shape (n_trace, n_x), m
    wave_grid : array_like, shape (n_wave,), m
    extrapolate_px : float >= 0

    Returns
    -------
    out, out_var : ndarray, shape (..., n_trace, n_wave)
    """
    s = np.asarray(spectra)
    v = np.asarray(variance, float)
    wp = np.asarray(wave_pixel, float)
    g = np.asarray(wave_grid, float)
    if s.shape[-2:] != wp.shape or v.shape != s.shape:
        raise ValueError(f"spectra {s.shape}, variance {v.shape} and wave_pixel {wp.shape} "
                         "must agree in (trace, x)")
    if np.any(np.diff(wp, axis=1) <= 0):
        raise ValueError("wave_pixel must increase along x for every trace")
    n_t, n_x = wp.shape
    idx = np.stack([np.searchsorted(wp[k], g) - 1 for k in range(n_t)])   # (trace, wave)
    e = float(extrapolate_px)
    inside = ((g[None, :] >= wp[:, :1] - e * (wp[:, 1:2] - wp[:, :1]))
              & (g[None, :] <= wp[:, -1:] + e * (wp[:, -1:] - wp[:, -2:-1])))
    idx = np.clip(idx, 0, n_x - 2)
    tr = np.arange(n_t)[:, None]
    w0, w1 = wp[tr, idx], wp[tr, idx + 1]
    a = (g[None, :] - w0) / (w1 - w0)
    disp = np.gradient(wp, axis=1)
    dg = np.gradient(g) if g.size > 1 else np.ones(1)
    b0, b1 = (1 - a) * dg / disp[tr, idx], a * dg / disp[tr, idx + 1]
    out = b0 * s[..., tr, idx] + b1 * s[..., tr, idx + 1]
    out_var = b0 ** 2 * v[..., tr, idx] + b1 ** 2 * v[..., tr, idx + 1]
    nan = np.nan if not np.iscomplexobj(out) else np.nan + 0j
    return np.where(inside, out, nan), np.where(inside, out_var, np.nan)


@dataclass(frozen=True)
class FixedWeightExtractor:
    """Linear extraction operator of :func:`fixed_weight_extractor`.

    Attributes
    ----------
    operator : ndarray (x, trace, y) -- flux[f, t, x] = sum_y operator[x, t, y] frame[f, y, x]
    profiles : ndarray (x, trace, y) -- the normalised profiles, column-major
    covered : ndarray (trace, x), bool -- enough usable profile (else flux NaN)
    valid : ndarray (y, x), bool -- the pixels used
    """
    operator: np.ndarray
    profiles: np.ndarray
    covered: np.ndarray
    valid: np.ndarray

    def __post_init__(self):
        # what every chunk of frames uses, made once: the operator with zeros for NaN and
        # its square (variance propagation), both (x, y, trace) contiguous for the
        # batched products; the usable pixels and those near a trace, (x, 1, y)
        op = np.ascontiguousarray(np.nan_to_num(self.operator).transpose(0, 2, 1))
        object.__setattr__(self, "_filled_t", op)
        object.__setattr__(self, "_squared_t", op ** 2)
        object.__setattr__(self, "_valid_t", self.valid.T[:, None, :])
        object.__setattr__(self, "_near", ((self.profiles.max(axis=1) > 1e-3)
                                           & self.valid.T)[:, None, :])


def fixed_weight_extractor(profiles, variance, *, valid=None,
                           min_coverage: float = 0.5) -> FixedWeightExtractor:
    """Weighted least-squares extraction operator with weights fixed per pixel.

    For a long series of frames of one steady source (a lamp delay scan) the optimal
    weights 1 / V hardly change from frame to frame: a fringe scales a trace's flux, and
    so its photon variance, by one factor at all of its pixels in a column, which leaves
    its weighted mean unchanged. Weights from one reference variance image (read noise
    plus the series' mean frame) give every frame's fluxes by one batched matrix product
    instead of an iterative fit per frame; neighbouring traces are solved jointly as in
    :func:`optimal_extract`.

    Parameters
    ----------
    profiles : array_like, shape (n_trace, n_y, n_x), normalised cross-profiles
    variance : array_like, shape (n_y, n_x), e-^2 -- reference variance (> 0 where valid)
    valid : array_like of bool, shape (n_y, n_x), optional -- usable pixels
    min_coverage : float in (0, 1] -- as in :func:`optimal_extract`

    Returns
    -------
    FixedWeightExtractor
    """
    prof = np.asarray(profiles, float)
    var = np.asarray(variance, float)
    if prof.ndim != 3 or var.shape != prof.shape[1:]:
        raise ValueError(f"profiles (trace, y, x) {prof.shape} and variance (y, x) "
                         f"{var.shape} must agree")
    ok = np.ones(var.shape, bool) if valid is None else np.asarray(valid, bool).copy()
    ok &= np.isfinite(var) & (var > 0)
    p = prof.transpose(2, 0, 1)                                           # (x, trace, y)
    w = np.where(ok, 1.0 / np.where(ok, var, 1.0), 0.0).T                 # (x, y)
    total = p.sum(axis=2)
    covered = (p * ok.T[:, None, :]).sum(axis=2) >= min_coverage * np.maximum(total, 1e-300)
    covered &= total > 0
    pw = p * w[:, None, :] * covered[..., None]                           # (x, trace, y)
    m = pw @ p.transpose(0, 2, 1)                                         # (x, trace, trace)
    eye = np.eye(p.shape[1])
    m = np.where(covered[:, :, None] & covered[:, None, :], m, eye * ~covered[:, :, None])
    op = np.linalg.solve(m, pw)
    op[~covered] = np.nan
    return FixedWeightExtractor(operator=op, profiles=p, covered=covered.T, valid=ok)


def apply_fixed_weights(extractor: FixedWeightExtractor, frames, *, read_noise,
                        clip: float = 6.0):
    """Fluxes, variances and outlier flags of frames with a :func:`fixed_weight_extractor`.

    Parameters
    ----------
    extractor : FixedWeightExtractor
    frames : array_like, shape (n_frame, n_y, n_x), e- (dark subtracted, divided by the
        pixel response); pixels the extractor does not use are ignored
    read_noise : float or array_like broadcastable to (n_y, n_x), e-
    clip : float -- a frame whose model residual exceeds this many standard deviations
        at a used pixel where some trace's profile exceeds 1e-3 is flagged (a cosmic ray:
        extract it with :func:`optimal_extract` instead)

    Returns
    -------
    flux, variance : ndarray (frame, trace, x) -- variance from the frame's own model
        (read noise + max(model, 0), propagated through the operator)
    suspect : ndarray (frame,), bool
    """
    d = np.asarray(frames, float)
    # (x, frame, y) in C order: np.where would keep the frames' memory order, and every
    # later operation mixing it with the C-ordered model would stride through memory
    dx = np.array(d.transpose(2, 0, 1), order="C")
    np.copyto(dx, 0.0, where=~extractor._valid_t)
    flux = dx @ extractor._filled_t                                       # (x, frame, trace)
    model = flux @ extractor.profiles                                     # (x, frame, y)
    rn2 = np.broadcast_to(np.asarray(read_noise, float) ** 2, extractor.valid.shape).T
    vmod = np.maximum(model, 0.0)
    vmod += rn2[:, None, :]                                               # (x, frame, y)
    var = vmod @ extractor._squared_t                                     # (x, frame, trace)
    # outliers: (d - m)^2 > clip^2 V, in place on the frames' copy (no division)
    dx -= model
    dx *= dx
    vmod *= clip ** 2
    suspect = ((dx > vmod) & extractor._near).any(axis=(0, 2))
    bad = ~extractor.covered.T[:, None, :]                                # (x, 1, trace)
    flux = np.where(bad, np.nan, flux).transpose(1, 2, 0)
    var = np.where(bad, np.nan, var).transpose(1, 2, 0)
    return flux, var, suspect
