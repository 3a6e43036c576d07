# SPDX-License-Identifier: BSD-3-Clause
"""Interferometric observables of a binary model: squared visibilities, closure phases
and referenced phases, as plain numpy functions.

The complex visibility comes from :func:`pipeline.skymodel.binary_visibility`
(two point sources or uniform disks, fibre attenuation, Gaussian bandwidth
smearing per channel), the formulas the simulator also uses. This module adds
the flux-ratio spectral law, the closure triangles, averaging over the frames
of an exposure, and a chi-square evaluated on a grid of companion positions
(the global search of the binary fit), the trial flux ratios sharing each
position's phasors.

Axes: ``pol`` (1 or 2), ``baseline`` (6, order of ``[combiner].baselines``),
``triangle`` (4, order of ``Combiner.triangles``), ``wave`` (channels),
``time`` (frames whose (u, v) the exposure averages over).
Closure phase of triangle (i, j, k): arg(V_ij V_jk conj(V_ik)), the bispectrum
of the OIFITS v2 T3 table (Duvert, Young & Hummel 2017, A&A 597, A8).
"""

from __future__ import annotations

import numpy as np
from scipy.special import jv

from pipeline.skymodel import (MAS, binary_visibility, fibre_coupling, point_phasor,
                               smearing_envelope, uniform_disk_visibility)

from .trig import wrap_phase as wrap      # (-pi, pi]; re-exported for the fits

__all__ = ["BASELINES", "TRIANGLES", "REF_WAVE_M", "PARAM_NAMES", "flux_ratio_law",
           "binary_observables", "binary_observables_batch", "axis_phasors", "grid_chi2",
           "make_residual", "wrap"]

BASELINES = ((0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3))
TRIANGLES = ((0, 1, 2), (0, 1, 3), (0, 2, 3), (1, 2, 3))
REF_WAVE_M = 2.2e-6
"""Reference wavelength of the flux ratio and of the fibre FWHM, metres."""


def flux_ratio_law(wave_m, flux_ratio, slope=0.0):
    """Companion/primary flux ratio per channel, r(lambda) = r0 (lambda / 2.2 um)^slope.

    Parameters
    ----------
    wave_m : array_like, shape (n_wave,), metres
    flux_ratio : float or array_like broadcastable against wave, dimensionless, at 2.2 um
    slope : float, power-law index (0 = grey)
    """
    return np.asarray(flux_ratio, float) * (np.asarray(wave_m, float) / REF_WAVE_M) ** slope


def _triangle_index(baselines, triangles):
    """Baseline indices (ij, jk, ik) of each triangle, shape (n_triangle, 3)."""
    bl = list(map(tuple, baselines))
    return np.array([[bl.index((i, j)), bl.index((j, k)), bl.index((i, k))]
                     for i, j, k in triangles])


def _uv(uvw_m):
    uvw = np.asarray(uvw_m, float)
    if uvw.ndim == 2:
        uvw = uvw[None]
    if uvw.ndim != 3 or uvw.shape[-1] != 3:
        raise ValueError(f"uvw must have shape (baseline, 3) or (time, baseline, 3), "
                         f"found {np.shape(uvw_m)}")
    return uvw[..., 0, None], uvw[..., 1, None]          # (time, baseline, 1)


def binary_observables(uvw_m, wave_m, *, dra_mas, ddec_mas, flux_ratio, flux_slope=0.0,
                       primary_dra_mas=0.0, primary_ddec_mas=0.0, diameter1_mas=0.0,
                       diameter2_mas=0.0, bandwidth_m=None, fibre_fwhm_mas=None,
                       baselines=BASELINES, triangles=TRIANGLES):
    """Squared visibility, closure phase and phase of a binary, averaged over frames.

    Parameters
    ----------
    uvw_m : ndarray, shape (n_baseline, 3) or (n_time, n_baseline, 3), metres
        Projected baselines; with a time axis the observables are the frame averages
        (mean |V|^2, argument of the mean bispectrum, argument of the mean V).
    wave_m : ndarray, shape (n_wave,), metres
    dra_mas, ddec_mas : float, companion minus primary (East, North), mas
    flux_ratio : float, true on-sky companion/primary flux ratio at 2.2 um
    flux_slope : float, spectral index of the flux ratio (:func:`flux_ratio_law`)
    primary_dra_mas, primary_ddec_mas : float, primary offset from the science
        fibre's pointing (phase centre), mas
    diameter1_mas, diameter2_mas : float, uniform-disk diameters, mas
    bandwidth_m : ndarray, shape (n_wave,) or (n_baseline, n_wave), metres, or None (no
        smearing)
    fibre_fwhm_mas : float or None, fibre acceptance FWHM at 2.2 um (None: no attenuation)

    Returns
    -------
    vis2 : ndarray, shape (n_baseline, n_wave)
    t3phi : ndarray, shape (n_triangle, n_wave), radians
    visphi : ndarray, shape (n_baseline, n_wave), radians
    """
    u, v = _uv(uvw_m)
    wave = np.asarray(wave_m, float)
    vis = binary_visibility(
        u, v, wave, dx_rad=dra_mas * MAS, dy_rad=ddec_mas * MAS,
        flux_ratio=flux_ratio_law(wave, flux_ratio, flux_slope),
        x1_rad=primary_dra_mas * MAS, y1_rad=primary_ddec_mas * MAS,
        diameter1_rad=diameter1_mas * MAS, diameter2_rad=diameter2_mas * MAS,
        bandwidth_m=bandwidth_m,
        fibre_fwhm_rad_at_2p2um=None if fibre_fwhm_mas is None else fibre_fwhm_mas * MAS)
    tri = _triangle_index(baselines, triangles)
    bis = vis[:, tri[:, 0]] * vis[:, tri[:, 1]] * np.conj(vis[:, tri[:, 2]])
    return (np.mean(np.abs(vis) ** 2, axis=0), np.angle(np.mean(bis, axis=0)),
            np.angle(np.mean(vis, axis=0)))


def _phasor(u_m, v_m, wave_m, x_rad, y_rad):
    """:func:`pipeline.skymodel.point_phasor` from the cosine and sine of the real phase
    -2 pi (u x + v y) / lambda (a complex exponential costs both and more); equal to it
    to rounding of the phase."""
    phase = (-2 * np.pi) * (u_m * x_rad + v_m * y_rad) / wave_m
    out = np.empty(phase.shape, complex)
    np.cos(phase, out=out.real)
    np.sin(phase, out=out.imag)
    return out


PARAM_NAMES = ("dra", "ddec", "flux_ratio", "flux_slope", "primary_dra", "primary_ddec",
               "diameter1", "diameter2")
"""Parameters of the binary model (mas, except the flux ratio and its slope)."""


def binary_observables_batch(uvw_m, wave_m, params, *, bandwidth_m=None, fibre_fwhm_mas=None,
                             baselines=BASELINES, triangles=TRIANGLES, derivatives=()):
    """:func:`binary_observables` for many parameter sets at once, with derivatives.

    Parameters
    ----------
    uvw_m : ndarray, shape (n_baseline, 3) or (n_time, n_baseline, 3), metres
    wave_m : ndarray, shape (n_wave,), metres
    params : mapping of :data:`PARAM_NAMES` to arrays of shape (n_set,) (or floats)
    bandwidth_m, fibre_fwhm_mas, baselines, triangles : as :func:`binary_observables`
    derivatives : sequence of names in :data:`PARAM_NAMES`: also return the analytic
        derivatives of the observables with respect to these parameters (per mas for
        offsets and diameters)

    Returns
    -------
    vis2 : ndarray, shape (n_set, n_baseline, n_wave)
    t3phi : ndarray, shape (n_set, n_triangle, n_wave), radians
    visphi : ndarray, shape (n_set, n_baseline, n_wave), radians
    d_vis2, d_t3phi, d_visphi : only with ``derivatives``; shapes (n_set, n_derivative,
        n_row, n_wave)

    The model is that of ``pipeline.skymodel.binary_visibility``, composed here from the
    same factors (phasors, disks, smearing, fibre coupling) because its diameters must
    be scalars. With V = (A1 + A2) / (f1 + f2), A_k = f_k P_k U_k E_k (flux with fibre
    coupling, phasor, disk, smearing), every parameter's dV follows from d ln of the
    factors; then d|V|^2 = 2 Re(conj(V) dV), d arg V = Im(dV / V), and the bispectrum's
    d arg = Im(dB / B) (frame means taken first).
    """
    u, v = _uv(uvw_m)                                               # (time, baseline, 1)
    wave = np.asarray(wave_m, float)
    n = np.broadcast(*[np.asarray(params.get(k, 0.0)) for k in PARAM_NAMES]).size

    def par(name):                                                  # (set, 1, 1, 1)
        return np.broadcast_to(np.asarray(params.get(name, 0.0), float), (n,))[:, None, None,
                                                                                  None]
    x1, y1 = par("primary_dra") * MAS, par("primary_ddec") * MAS
    x2, y2 = x1 + par("dra") * MAS, y1 + par("ddec") * MAS
    law = flux_ratio_law(wave, 1.0, par("flux_slope"))              # (set, 1, 1, wave)
    f1, f2_unit = np.ones_like(wave), law
    if fibre_fwhm_mas is not None:
        f1 = f1 * fibre_coupling(x1, y1, wave, fibre_fwhm_mas * MAS)
        f2_unit = f2_unit * fibre_coupling(x2, y2, wave, fibre_fwhm_mas * MAS)
    ratio = par("flux_ratio")
    f2 = ratio * f2_unit
    terms = []                                      # per star: A_k / f_k (P U E), d ln parts
    for name, x, y in (("diameter1", x1, y1), ("diameter2", x2, y2)):
        vis = _phasor(u, v, wave, x, y)                             # (set, time, baseline, wave)
        d = par(name)
        disk = None
        if np.any(d != 0):
            disk = uniform_disk_visibility(u, v, wave, d * MAS)
            vis = vis * disk
        if bandwidth_m is not None:
            vis *= smearing_envelope(u * x + v * y, wave, bandwidth_m)
        terms.append((vis, x, y, d, disk))
    (p1, *_), (p2, *_) = terms
    den = f1 + f2
    inv_den = 1.0 / den
    a1, a2 = f1 * p1, f2 * p2                       # A_k
    vis = (a1 + a2) * inv_den
    tri = _triangle_index(baselines, triangles)

    def bispectrum(a, b):       # sum of the three one-factor-replaced products if b is given
        if b is None:
            return a[..., tri[:, 0], :] * a[..., tri[:, 1], :] * np.conj(a[..., tri[:, 2], :])
        return (b[..., tri[:, 0], :] * a[..., tri[:, 1], :] * np.conj(a[..., tri[:, 2], :])
                + a[..., tri[:, 0], :] * b[..., tri[:, 1], :] * np.conj(a[..., tri[:, 2], :])
                + a[..., tri[:, 0], :] * a[..., tri[:, 1], :] * np.conj(b[..., tri[:, 2], :]))

    def frame_mean(x):                              # (set, time, ...) -> (set, ...)
        return x[:, 0] if x.shape[1] == 1 else x.mean(1)
    bis = bispectrum(vis, None)
    vis_m, bis_m = frame_mean(vis), frame_mean(bis)
    out = (frame_mean(vis.real ** 2 + vis.imag ** 2), np.angle(bis_m), np.angle(vis_m))
    if not derivatives:
        return out

    # d ln of each star's term per unit offset (rad) along x and y
    two_pi_i = -2j * np.pi / wave
    ln2 = np.log(2)

    cache = {}

    def dln_position(x, y, axis_uv):
        key = (id(x), axis_uv is u)
        if key not in cache:
            cache[key] = _dln_position(x, y, axis_uv)
        return cache[key]

    def _dln_position(x, y, axis_uv):                # per mas
        g = two_pi_i * axis_uv                                      # phasor
        if bandwidth_m is not None:
            dsig = np.asarray(bandwidth_m) / wave ** 2
            g = g - (np.pi * dsig) ** 2 * (u * x + v * y) * axis_uv / (2 * ln2)
        if fibre_fwhm_mas is not None:
            fwhm = fibre_fwhm_mas * MAS * wave / REF_WAVE_M
            coord = x if axis_uv is u else y
            g = g - 8 * ln2 * coord / fwhm ** 2                     # coupling (real)
            return g * MAS, -8 * ln2 * coord / fwhm ** 2 * MAS
        return g * MAS, 0.0
    companion_term = {}                             # a2 d ln(A2) per axis, shared by
                                                    # the companion's and primary's offsets
    d_vis = np.empty((n, len(derivatives)) + vis.shape[1:], complex)  # (set, der, time, ...)
    for j, name in enumerate(derivatives):
        if name in ("dra", "ddec", "primary_dra", "primary_ddec"):
            axis_uv = u if name in ("dra", "primary_dra") else v
            g2, c2 = dln_position(x2, y2, axis_uv)
            key = axis_uv is u
            if key not in companion_term:
                companion_term[key] = a2 * g2
            d_num, d_den = companion_term[key], f2 * c2
            if name.startswith("primary"):
                g1, c1 = dln_position(x1, y1, axis_uv)
                d_num, d_den = d_num + a1 * g1, d_den + f1 * c1
        elif name == "flux_ratio":
            d_num, d_den = f2_unit * p2, f2_unit
        elif name == "flux_slope":
            ln_law = np.log(wave / REF_WAVE_M)
            d_num, d_den = a2 * ln_law, f2 * ln_law
        elif name in ("diameter1", "diameter2"):
            p, x, y, d, _ = terms[int(name[-1]) - 1]
            z = np.pi * d * MAS * np.hypot(u, v) / wave
            with np.errstate(invalid="ignore", divide="ignore"):
                dlog_disk = np.where(np.abs(z) < 1e-8, -z / 4,
                                     -jv(2, z) / np.where(z == 0, 1, z)) * 2
                disk = uniform_disk_visibility(u, v, wave, d * MAS)
                ratio_dz = np.where(disk != 0, dlog_disk / np.where(disk != 0, disk, 1), 0.0)
            # d U / d theta = dU/dz * z / theta = dU/dz * pi rho; ratio_dz = (dU/dz) / U
            zf = np.pi * MAS * np.hypot(u, v) / wave
            d_num = (a1 if name == "diameter1" else a2) * ratio_dz * zf
            d_den = 0.0
        else:
            raise ValueError(f"unknown parameter {name!r}; known {PARAM_NAMES}")
        np.multiply(vis, d_den, out=d_vis[:, j])
        np.subtract(d_num, d_vis[:, j], out=d_vis[:, j])
        d_vis[:, j] *= inv_den
    # All derivatives at once, (set, der, [time,] row, wave).
    vis_d, vis_md = vis[:, None], vis_m[:, None]
    if vis.shape[1] == 1:
        # conj(V) dV: d|V|^2 = 2 Re(conj(V) dV), d arg V = Im(conj(V) dV) / |V|^2, and
        # dB / B = d ln V_ij + d ln V_jk + conj(d ln V_ik): the closure phase's derivative
        # is the signed sum of the three phase derivatives.
        vr, vi = vis_md.real.copy(), vis_md.imag.copy()                 # (set, 1, bl, wave)
        dr, di = d_vis[:, :, 0].real, d_vis[:, :, 0].imag               # (set, der, bl, wave)
        d_v2 = 2 * (vr * dr + vi * di)
        d_ph = (vr * di - vi * dr) * (1 / (vr * vr + vi * vi))
        d_t3 = np.empty(d_ph.shape[:2] + (len(tri), d_ph.shape[-1]))
        for t, (ij, jk, ik) in enumerate(tri):
            np.add(d_ph[:, :, ij], d_ph[:, :, jk], out=d_t3[:, :, t])
            d_t3[:, :, t] -= d_ph[:, :, ik]
        return out + (d_v2, d_t3, d_ph)
    d_v2 = 2 * (vis_d.real * d_vis.real + vis_d.imag * d_vis.imag)
    d_t3 = (bispectrum(vis_d, d_vis).mean(2) / bis_m[:, None]).imag
    d_ph = (d_vis.mean(2) / vis_md).imag
    return out + (d_v2.mean(2), d_t3, d_ph)


def axis_phasors(u_m, v_m, wave_m, x_rad, y_rad):
    """Per-axis factors of the point-source phasor on a rectangular grid of positions.

    exp(-2 pi i (u x + v y) / lambda) = exp(-2 pi i u x / lambda) exp(-2 pi i v y / lambda),
    so the phasors of every grid point (x_a, y_b) are products of one factor per x value
    and one per y value (n_x + n_y complex exponentials instead of n_x n_y).

    Parameters
    ----------
    u_m, v_m : ndarray, shape (n_baseline, 1), metres
    wave_m : ndarray, shape (n_wave,), metres
    x_rad, y_rad : ndarray, shapes (n_x,), (n_y,), radians

    Returns
    -------
    px : ndarray, shape (n_x, n_baseline, n_wave), complex: exp(-2 pi i u x / lambda)
    py : ndarray, shape (n_y, n_baseline, n_wave), complex: exp(-2 pi i v y / lambda)
    """
    x = np.asarray(x_rad, float)[:, None, None]
    y = np.asarray(y_rad, float)[:, None, None]
    return point_phasor(u_m, v_m, wave_m, x, 0.0), point_phasor(u_m, v_m, wave_m, 0.0, y)


def grid_chi2(vis2, vis2_err, t3phi, t3phi_err, uvw_m, wave_m, *, dra_mas, ddec_mas,
              flux_ratios, bandwidth_m=None, fibre_fwhm_mas=None, primary_dra_mas=0.0,
              primary_ddec_mas=0.0, diameters_mas=(0.0, 0.0), baselines=BASELINES,
              triangles=TRIANGLES, chunk_positions=128):
    """Chi-square of squared visibilities and closure phases on a grid of companions.

    Invalid data points carry a weight of zero (NaN value or non-positive/non-finite
    error). Polarisations are folded first: for V2, sum_p w_p (d_p - m)^2 = W m^2 - 2 m S + Q;
    for closure phases the squared wrapped residual is replaced by its smooth surrogate
    2 (1 - cos(d - m)), equal to second order and exact at the minimum's location for
    small residuals.

    The flux ratio r enters the model as V = (a + r b) / (f1 + r c), with a the
    primary's term (per baseline and channel, fixed), b the companion's (phasor,
    fibre coupling c, smearing and disk factors) and the denominator real. So
    |a + r b|^2 = p0 + r p1 + r^2 p2 with real p_k, the V2 sums over baselines are
    polynomials in r whose coefficients are summed once per position, and the
    bispectrum's numerator is a cubic in r with complex coefficients. Each trial ratio
    then costs real polynomial evaluations only; positions are processed in chunks of
    ``chunk_positions`` so the working arrays stay in cache.

    The companion's factors are built from per-axis pieces of the distinct dRA and
    dDec values (a square grid has few): phasors (:func:`axis_phasors`), fibre
    coupling (a Gaussian: exp(-k (x^2 + y^2)) = exp(-k x^2) exp(-k y^2)) and the
    smearing envelope's path difference u x + v y; only the envelope's exponential is
    evaluated per position.

    Parameters
    ----------
    vis2, vis2_err : ndarray, shape (n_pol, n_baseline, n_wave)
    t3phi, t3phi_err : ndarray, shape (n_pol, n_triangle, n_wave), radians
    uvw_m : ndarray, shape (n_baseline, 3), metres (exposure mean)
    wave_m : ndarray, shape (n_wave,), metres
    dra_mas, ddec_mas : ndarray, shape (n_pos,), companion offsets, mas
    flux_ratios : ndarray, shape (n_ratio,), trial flux ratios (grey)
    diameters_mas : (float, float), uniform-disk diameters of primary and companion, mas
    A NaN ``vis2_err`` (or ``t3phi_err``) excludes that observable from the sum.

    The closure-phase term (>= 0) is evaluated first at each position's ratio best for
    V2 alone; a ratio whose V2 chi-square exceeds that total cannot be the position's
    minimum, and its entry holds its V2 chi-square (a lower bound, above the minimum)
    instead of the full sum. So ``chi2.min(1)`` and ``chi2.argmin(1)`` are those of
    the full chi-square; the other ratios' entries are exact.

    Returns
    -------
    chi2 : ndarray, shape (n_pos, n_ratio)
    """
    w2 = _weights(vis2, vis2_err)
    wt = _weights(t3phi, t3phi_err)
    d2 = np.where(w2 > 0, vis2, 0.0)
    dt = np.where(wt > 0, t3phi, 0.0)
    W2, S2, Q2 = w2.sum(0), (w2 * d2).sum(0), (w2 * d2 ** 2).sum(0)       # (baseline, wave)
    Zt = (wt * np.exp(1j * dt)).sum(0)                                    # (triangle, wave)
    tri = _triangle_index(baselines, triangles)
    u, v = _uv(uvw_m)
    u, v = u[0], v[0]                                                     # (baseline, 1)
    wave = np.asarray(wave_m, float)
    ratios = np.asarray(flux_ratios, float)
    dra, ddec = np.asarray(dra_mas, float), np.asarray(ddec_mas, float)
    fwhm = None if fibre_fwhm_mas is None else fibre_fwhm_mas * MAS
    x1, y1 = primary_dra_mas * MAS, primary_ddec_mas * MAS

    coupling1 = np.ones_like(wave) if fwhm is None else fibre_coupling(x1, y1, wave, fwhm)
    v1 = point_phasor(u, v, wave, x1, y1)
    if diameters_mas[0]:
        v1 = v1 * uniform_disk_visibility(u, v, wave, diameters_mas[0] * MAS)
    if bandwidth_m is not None:
        v1 = v1 * smearing_envelope(u * x1 + v * y1, wave, bandwidth_m)
    a = coupling1 * v1                                                    # (baseline, wave)
    f1 = coupling1                                                        # (wave,)

    # Companion: per-axis factors of the distinct offsets.
    xs, ix = np.unique(dra, return_inverse=True)
    ys, iy = np.unique(ddec, return_inverse=True)
    ax_x, ax_y = x1 + xs * MAS, y1 + ys * MAS                             # (n_x,), (n_y,)
    px, py = axis_phasors(u, v, wave, ax_x, ax_y)                         # (n_x|n_y, bl, wave)
    if diameters_mas[1]:
        px = px * uniform_disk_visibility(u, v, wave, diameters_mas[1] * MAS)
    if fwhm is None:
        cx, cy = np.ones((xs.size, wave.size)), np.ones((ys.size, wave.size))
    else:
        cx = fibre_coupling(ax_x[:, None], 0.0, wave, fwhm)               # (n_x, wave)
        cy = fibre_coupling(0.0, ax_y[:, None], wave, fwhm)
    if bandwidth_m is not None:
        # smearing_envelope(opd) = exp(-kappa opd^2), kappa = (pi dsigma)^2 / (4 ln 2)
        dsig = np.asarray(bandwidth_m) / wave ** 2
        kappa = -(np.pi * dsig) ** 2 / (4 * np.log(2)) * np.ones((u.size, wave.size))
        ox, oy = u * ax_x[:, None, None], v * ax_y[:, None, None]         # (n_x|n_y, bl, 1)

    p0 = a.real ** 2 + a.imag ** 2
    A0 = (W2 * p0 ** 2).sum(0)                                            # (wave,)
    B0 = (S2 * p0).sum(0)
    a_ij, a_jk, a_ik = a[tri[:, 0]], a[tri[:, 1]], np.conj(a[tri[:, 2]])
    z_conj = np.conj(Zt)
    e0 = (a_ij * a_jk * a_ik * z_conj).real                               # (triangle, wave)
    W2p0 = W2 * p0
    q_total = Q2.sum()
    t_total = 2 * wt.sum()
    n_r = ratios.size
    rr = ratios[:, None]                                                  # (ratio, 1)
    out = np.empty((dra.size, n_r))
    for s in range(0, dra.size, chunk_positions):
        jx, jy = ix[s:s + chunk_positions], iy[s:s + chunk_positions]
        c = cx[jx] * cy[jy]                                               # (pos, wave)
        b = px[jx] * py[jy]                                               # (pos, baseline, wave)
        if bandwidth_m is not None:
            opd = ox[jx] + oy[jy]                                         # (pos, baseline, 1)
            env = np.exp(kappa * opd ** 2)                                # (pos, baseline, wave)
            b *= env
        b *= c[:, None]
        p1 = 2 * (a.real * b.real + a.imag * b.imag)
        p2 = b.real ** 2 + b.imag ** 2
        # V2: sum_bl W m^2 = (sum_k A_k r^k) / den^4, sum_bl S m = (sum_k B_k r^k) / den^2
        A1 = 2 * np.einsum("bw,pbw->pw", W2p0, p1)
        A2 = np.einsum("bw,pbw->pw", W2, p1 ** 2 + 2 * p0 * p2)
        A3 = 2 * np.einsum("bw,pbw,pbw->pw", W2, p1, p2)
        A4 = np.einsum("bw,pbw->pw", W2, p2 ** 2)
        B1 = np.einsum("bw,pbw->pw", S2, p1)
        B2 = np.einsum("bw,pbw->pw", S2, p2)
        # All ratios at once, (pos, ratio, wave): den2 (den2 P4(r) - 2 P2(r)), Horner, in place.
        den2 = c[:, None, :] * rr
        den2 += f1
        np.square(den2, out=den2)
        np.reciprocal(den2, out=den2)
        poly = A4[:, None] * rr
        for coef in (A3, A2, A1):
            poly += coef[:, None]
            poly *= rr
        poly += A0
        poly *= den2
        poly2 = B2[:, None] * rr
        poly2 += B1[:, None]
        poly2 *= rr
        poly2 += B0
        poly2 *= 2
        poly -= poly2
        poly *= den2
        v2_sum = poly.sum(-1)
        # Closure phases: N_ij N_jk conj(N_ik) = g0 + g1 r + g2 r^2 + g3 r^3, projected on Z
        b_ij, b_jk, b_ik = b[:, tri[:, 0]], b[:, tri[:, 1]], np.conj(b[:, tri[:, 2]])
        bjk_aik, ajk_bik, bjk_bik = b_jk * a_ik, a_jk * b_ik, b_jk * b_ik
        ajk_aik = a_jk * a_ik
        e1 = ((b_ij * ajk_aik + a_ij * (bjk_aik + ajk_bik)) * z_conj).real
        e2 = ((b_ij * (bjk_aik + ajk_bik) + a_ij * bjk_bik) * z_conj).real
        e3 = (b_ij * bjk_bik * z_conj).real                               # (pos, triangle, wave)
        # The closure-phase chi-square is >= 0, so the V2 chi-square alone bounds each
        # ratio's total from below: a ratio whose V2 term already exceeds the total at
        # the V2-best ratio (evaluated first) cannot be the position's minimum and keeps
        # that bound; only the other ratios' closure-phase sums are evaluated.
        rows = np.arange(len(jx))
        chi2_v2 = v2_sum + q_total                                        # (pos, ratio)
        first = chi2_v2.argmin(1)
        cp_sum = np.full((len(jx), n_r), t_total / 2)                     # bound: chi2_cp = 0
        cp_sum[rows, first] = _cp_projection(p0, p1, p2, e0, e1, e2, e3,
                                             ratios[first][:, None, None], tri)
        bound = chi2_v2[rows, first] + t_total - 2 * cp_sum[rows, first]
        need = chi2_v2 <= bound[:, None]
        need[rows, first] = False
        for k, r in enumerate(ratios):
            idx = np.flatnonzero(need[:, k])
            if idx.size > len(jx) // 2:
                cp_sum[idx, k] = _cp_projection(p0, p1, p2, e0, e1, e2, e3, r, tri)[idx]
            elif idx.size:
                cp_sum[idx, k] = _cp_projection(p0, p1[idx], p2[idx], e0, e1[idx], e2[idx],
                                                e3[idx], r, tri)
        out[s:s + chunk_positions] = chi2_v2 + t_total - 2 * cp_sum
    return out


def _cp_projection(p0, p1, p2, e0, e1, e2, e3, r, tri):
    """sum over (triangle, wave) of Re(conj(Z) B) / |B| for the bispectrum numerator
    B = N_ij N_jk conj(N_ik), |N|^2 = p0 + r p1 + r^2 p2 per baseline and
    Re(conj(Z) B) = e0 + r e1 + r^2 e2 + r^3 e3; r a scalar or (pos, 1, 1). Shape (pos,)."""
    q = p1 + r * p2
    q *= r
    q += p0                                                               # |N|^2 per baseline
    mod = q[:, tri[:, 0]] * q[:, tri[:, 1]]
    mod *= q[:, tri[:, 2]]
    np.sqrt(mod, out=mod)
    np.maximum(mod, 1e-300, out=mod)
    num = e3 * r
    num += e2
    num *= r
    num += e1
    num *= r
    num += e0
    num /= mod
    return num.reshape(len(num), -1) @ np.ones(num[0].size, num.dtype)


def make_residual(obs, *, fibre_fwhm_mas, vis2, t3phi, visphi, weight):
    """Residual function of a least-squares fit, and its number of valid points.

    ``obs`` supplies errors, (u, v, w), wavelengths, bandwidths, baselines and
    triangles (a ``binary_fit.Observables``); ``vis2``, ``t3phi``, ``visphi`` (None:
    not fitted) are the data (possibly a bootstrap realisation); ``weight`` (n_wave,)
    multiplies each channel's squared residual (channel bootstrap). The returned
    function maps parameters (anything with ``valuesdict()``: dra, ddec, flux_ratio,
    flux_slope, primary_dra, primary_ddec, diameter1, diameter2; mas) to
    (data - model) / error over the
    valid points, phases wrapped to (-pi, pi]. Its attribute ``jacobian`` maps the
    same parameters to the analytic derivatives of those residuals, shape (n_point,
    n_varying), columns in the order of the varying parameters (lmfit's ``Dfun``).
    """
    ok2 = np.isfinite(vis2) & np.isfinite(obs.vis2_err) & (obs.vis2_err > 0)
    okt = np.isfinite(t3phi) & np.isfinite(obs.t3phi_err) & (obs.t3phi_err > 0)
    okp = (np.isfinite(visphi) & np.isfinite(obs.visphi_err) & (obs.visphi_err > 0)
           if visphi is not None else None)
    sw = np.sqrt(weight)

    def residual(params):
        p = params.valuesdict()
        m2, mt, mp = binary_observables(
            obs.uvw, obs.wave, dra_mas=p["dra"], ddec_mas=p["ddec"], flux_ratio=p["flux_ratio"],
            flux_slope=p["flux_slope"], primary_dra_mas=p["primary_dra"],
            primary_ddec_mas=p["primary_ddec"], diameter1_mas=p.get("diameter1", 0.0),
            diameter2_mas=p.get("diameter2", 0.0), bandwidth_m=obs.bandwidth,
            fibre_fwhm_mas=fibre_fwhm_mas,
            baselines=obs.baselines, triangles=obs.triangles)
        parts = [((vis2 - m2) / obs.vis2_err * sw)[ok2],
                 (wrap(t3phi - mt) / obs.t3phi_err * sw)[okt]]
        if visphi is not None:
            parts.append((wrap(visphi - mp) / obs.visphi_err * sw)[okp])
        return np.concatenate(parts)

    def jacobian(params):
        p = params.valuesdict()
        varying = [name for name, par in params.items() if par.vary]
        _, _, _, d2, dt, dp = binary_observables_batch(
            obs.uvw, obs.wave, {k: p.get(k, 0.0) for k in PARAM_NAMES}, derivatives=varying,
            bandwidth_m=obs.bandwidth, fibre_fwhm_mas=fibre_fwhm_mas,
            baselines=obs.baselines, triangles=obs.triangles)           # (1, var, row, wave)
        parts = [(-d2[0][:, None] / obs.vis2_err * sw)[:, ok2],
                 (-dt[0][:, None] / obs.t3phi_err * sw)[:, okt]]
        if visphi is not None:
            parts.append((-dp[0][:, None] / obs.visphi_err * sw)[:, okp])
        return np.concatenate(parts, axis=1).T
    residual.jacobian = jacobian
    return residual, int(ok2.sum() + okt.sum() + (okp.sum() if okp is not None else 0))


def _weights(value, err):
    value, err = np.asarray(value, float), np.asarray(err, float)
    ok = np.isfinite(value) & np.isfinite(err) & (err > 0)
    return np.where(ok, 1.0 / np.where(ok, err, 1.0) ** 2, 0.0)
