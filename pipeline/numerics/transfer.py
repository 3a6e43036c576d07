# SPDX-License-Identifier: BSD-3-Clause
"""Calibration of averaged observables with calibrator stars.

* Expected calibrator visibility: uniform disk of the catalogue diameter,
  V = 2 J1(z) / z, z = pi theta |b| / lambda (``pipeline.skymodel``), with the
  diameter error propagated to first order through
  dV/dtheta = -2 J2(z) / z * pi |b| / lambda (from d/dz [J1(z)/z] = -J2(z)/z,
  Abramowitz & Stegun 1964, Handbook of Mathematical Functions, eq. 9.1.30).
* Transfer function T = measured / expected per baseline and wavelength, with
  the relative errors added in quadrature.
* Interpolation in time between calibrators: linear between the two
  calibrators that bracket the science time, constant (nearest calibrator)
  outside the calibrators' time span; ``method="nearest"`` uses the closest
  calibrator everywhere. With weights a and 1 - a the interpolated error is
  sqrt(a^2 s1^2 + (1 - a)^2 s2^2) (calibrators independent). This ignores the
  real drift of the transfer function between calibrators, which only denser
  calibration can measure; ``scatter_floor`` adds, in quadrature, a fraction
  of the difference between the two bracketing calibrators as a systematic term.
* Phase zero-points: closure phases and referenced phases of a calibrator,
  minus the phase its model predicts (0 or pi for a uniform disk), are the
  instrument's zero-points; they are interpolated like the transfer function
  (on the circle) and subtracted.

Mask policy: NaN in a calibrator's data propagates to the interpolated value
at that baseline and wavelength only when it is one of the calibrators used;
no value is dropped silently.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from scipy.special import jv

from pipeline.skymodel import MAS, uniform_disk_visibility

from .trig import wrap_phase

__all__ = ["uniform_disk_vis2", "transfer_function", "interpolate_in_time",
           "interpolation_weights", "interpolate_phase_in_time", "calibrate_vis2",
           "calibrate_phase", "wrap_phase", "fit_phase_zero_point"]


def uniform_disk_vis2(u_m, v_m, wave_m, diameter_mas: float, diameter_err_mas: float = 0.0):
    """Squared visibility of a uniform disk and its error from the diameter error.

    Parameters
    ----------
    u_m, v_m : array_like, metres, broadcast with wave_m
    wave_m : array_like, metres
    diameter_mas, diameter_err_mas : float, milliarcseconds (header CALDIAM, CALDIAME)

    Returns
    -------
    vis : ndarray, signed visibility 2 J1(z)/z
    vis2, vis2_err : ndarray, V^2 and |dV^2/dtheta| * diameter_err
    """
    if not np.isfinite(diameter_mas) or diameter_mas < 0 or diameter_err_mas < 0:
        raise ValueError(f"calibrator diameter must be >= 0 with error >= 0 (mas), found "
                         f"{diameter_mas} +- {diameter_err_mas}")
    theta = diameter_mas * MAS
    vis = uniform_disk_visibility(u_m, v_m, wave_m, theta)
    rho = np.hypot(u_m, v_m) / np.asarray(wave_m)
    z = np.pi * theta * rho
    with np.errstate(invalid="ignore", divide="ignore"):
        dv_dz = np.where(np.abs(z) < 1e-8, -z / 4, -2 * jv(2, z) / np.where(z == 0, 1, z))
    dv2 = np.abs(2 * vis * dv_dz * np.pi * rho) * diameter_err_mas * MAS
    return vis, vis ** 2, dv2


def transfer_function(measured, measured_err, expected, expected_err):
    """T = measured / expected, errors in quadrature (first order).

    All arrays broadcast; returns (T, T_err).
    """
    m, e = np.asarray(measured, float), np.asarray(expected, float)
    with np.errstate(invalid="ignore", divide="ignore"):
        t = m / e
        terr = np.abs(t) * np.hypot(np.asarray(measured_err) / m, np.asarray(expected_err) / e)
    return t, terr


def interpolation_weights(t_cal, t_sci, *, method: Literal["linear", "nearest"] = "linear"):
    """Calibrators used at each science time and their weights.

    Returns
    -------
    lo, hi : ndarray of int, shape (n_sci,), indices into the sorted ``t_cal``
    a : ndarray, shape (n_sci,), weight of ``hi`` (``lo`` gets 1 - a)
    """
    t_cal = np.asarray(t_cal, float)
    t_sci = np.atleast_1d(np.asarray(t_sci, float))
    if t_cal.ndim != 1 or t_cal.size == 0:
        raise ValueError("need at least one calibrator time (1-D array)")
    if np.any(np.diff(t_cal) < 0):
        raise ValueError("calibrator times must be sorted in increasing order")
    n = t_cal.size
    if method == "nearest" or n == 1:
        k = np.abs(t_sci[:, None] - t_cal[None, :]).argmin(axis=1)
        return k, k, np.zeros(t_sci.shape)
    hi = np.clip(np.searchsorted(t_cal, t_sci, side="right"), 1, n - 1)
    lo = hi - 1
    span = t_cal[hi] - t_cal[lo]
    with np.errstate(invalid="ignore", divide="ignore"):
        a = np.where(span > 0, (t_sci - t_cal[lo]) / np.where(span > 0, span, 1), 0.5)
    a = np.clip(a, 0.0, 1.0)          # constant outside the calibrators' span
    return lo, hi, a


def interpolate_in_time(t_cal, values, errors, t_sci, *,
                        method: Literal["linear", "nearest"] = "linear",
                        scatter_floor: float = 0.0):
    """Interpolate a per-calibrator quantity (transfer function) to science times.

    Parameters
    ----------
    t_cal : ndarray, shape (n_cal,), any time unit (e.g. MJD), sorted
    values, errors : ndarray, shape (n_cal, ...)
    t_sci : float or ndarray, shape (n_sci,), same unit
    method : "linear" or "nearest"
    scatter_floor : float >= 0
        Fraction of |value_hi - value_lo| added in quadrature to the error.

    Returns
    -------
    value, error : ndarray, shape (n_sci, ...)
    """
    if method not in ("linear", "nearest"):
        raise ValueError(f"method must be 'linear' or 'nearest', found {method!r}")
    vals, errs = np.asarray(values, float), np.asarray(errors, float)
    lo, hi, a = interpolation_weights(t_cal, t_sci, method=method)
    a = a.reshape(a.shape + (1,) * (vals.ndim - 1))
    v = (1 - a) * vals[lo] + a * vals[hi]
    e2 = (1 - a) ** 2 * errs[lo] ** 2 + a ** 2 * errs[hi] ** 2
    e2 = e2 + (scatter_floor * (vals[hi] - vals[lo])) ** 2
    return v, np.sqrt(e2)


def interpolate_phase_in_time(t_cal, phases, errors, t_sci, *,
                              method: Literal["linear", "nearest"] = "linear"):
    """Like :func:`interpolate_in_time` for phases (radians): interpolates the
    wrapped difference between the bracketing calibrators, so a zero-point near
    +-pi does not jump. Returns (phase wrapped to (-pi, pi], error)."""
    if method not in ("linear", "nearest"):
        raise ValueError(f"method must be 'linear' or 'nearest', found {method!r}")
    ph, errs = np.asarray(phases, float), np.asarray(errors, float)
    lo, hi, a = interpolation_weights(t_cal, t_sci, method=method)
    a = a.reshape(a.shape + (1,) * (ph.ndim - 1))
    v = ph[lo] + a * wrap_phase(ph[hi] - ph[lo])
    e2 = (1 - a) ** 2 * errs[lo] ** 2 + a ** 2 * errs[hi] ** 2
    return wrap_phase(v), np.sqrt(e2)


def calibrate_vis2(vis2, vis2_err, tf, tf_err):
    """Calibrated V2 = raw / T; error from both in quadrature. Returns (v2, err)."""
    return transfer_function(vis2, vis2_err, tf, tf_err)


def calibrate_phase(phase, phase_err, zero_point, zero_point_err):
    """Calibrated phase = wrap(raw - zero point); errors in quadrature (radians)."""
    return wrap_phase(np.asarray(phase) - zero_point), np.hypot(phase_err, zero_point_err)


def fit_phase_zero_point(phase, phase_err, u_m, v_m, wave_m, star, *, max_condition=1e10):
    """Instrumental referenced-phase zero-point and the calibrators' own offsets.

    Model of calibrator exposure k of star s(k) (phases already minus the star's
    uniform-disk phase, 0 or pi):

        psi_k(b, lambda) = phi(b, lambda) - 2 pi (u_kb x_s + v_kb y_s) / lambda

    with phi constant over the night (instrument plus metrology constants) and
    (x_s, y_s) the star's offset from its commanded pointing (the sign convention
    of ``pipeline.skymodel``). Weighted linear least squares: phi is profiled out
    per baseline and wavelength (weighted means over exposures), the offsets are
    solved from the normal equations. They are identifiable only through the
    change of (u, v) between exposures; when the normal matrix is singular (one
    exposure, or no (u, v) change) the offsets are set to 0 and ``fitted`` is False.

    Parameters
    ----------
    phase, phase_err : ndarray, shape (n_cal, n_pol, n_base, n_wave), radians
    u_m, v_m : ndarray, shape (n_cal, n_base), metres
    wave_m : ndarray, shape (n_wave,), metres
    star : ndarray of int, shape (n_cal,), star index 0..n_star-1 of each exposure

    Returns
    -------
    zero_point, zero_point_err : ndarray, shape (n_pol, n_base, n_wave), radians
    offsets : ndarray, shape (n_pol, n_star, 2), radians (x East, y North)
    offsets_cov : ndarray, shape (n_pol, 2 n_star, 2 n_star), radians^2
    fitted : bool
    """
    psi = np.asarray(phase, float)
    err = np.asarray(phase_err, float)
    star = np.asarray(star, int)
    n_cal, n_pol, n_base, n_wave = psi.shape
    n_star = int(star.max()) + 1
    with np.errstate(invalid="ignore", divide="ignore"):
        w = np.where(np.isfinite(psi) & np.isfinite(err) & (err > 0), 1 / err ** 2, 0.0)
    psi = np.where(w > 0, psi, 0.0)
    k2 = 2 * np.pi / np.asarray(wave_m, float)
    g = np.zeros((n_cal, n_base, n_wave, 2 * n_star))
    rows = np.arange(n_cal)
    g[rows, :, :, 2 * star] = -np.asarray(u_m, float)[:, :, None] * k2
    g[rows, :, :, 2 * star + 1] = -np.asarray(v_m, float)[:, :, None] * k2
    sw = w.sum(axis=0)                                              # (pol, base, wave)
    with np.errstate(invalid="ignore", divide="ignore"):
        ref = np.angle((w * np.exp(1j * psi)).sum(axis=0))
        r = wrap_phase(psi - ref)
        rbar = (w * r).sum(axis=0) / sw
        gbar = np.einsum("kpbw,kbwj->pbwj", w, g) / sw[..., None]
    zp = np.empty((n_pol, n_base, n_wave))
    zp_err = np.empty_like(zp)
    offsets = np.zeros((n_pol, n_star, 2))
    cov = np.zeros((n_pol, 2 * n_star, 2 * n_star))
    fitted = n_cal >= 2
    for p in range(n_pol):                    # 1 or 2 polarisations: small loop
        a = g - np.nan_to_num(gbar[p])[None]                        # (cal, base, wave, j)
        y = r[:, p] - np.nan_to_num(rbar[p])[None]
        wp = w[:, p]
        normal = np.einsum("kbw,kbwi,kbwj->ij", wp, a, a)
        theta = np.zeros(2 * n_star)
        if fitted and np.linalg.cond(normal) < max_condition:
            cov[p] = np.linalg.inv(normal)
            theta = cov[p] @ np.einsum("kbw,kbwi,kbw->i", wp, a, np.where(wp > 0, y, 0.0))
        else:
            fitted = False
        offsets[p] = theta.reshape(n_star, 2)
        with np.errstate(invalid="ignore", divide="ignore"):
            zp[p] = wrap_phase(ref[p] + rbar[p] - gbar[p] @ theta)
            zp_err[p] = np.sqrt(1 / sw[p] + np.einsum("bwi,ij,bwj->bw", np.nan_to_num(gbar[p]),
                                                      cov[p], np.nan_to_num(gbar[p])))
    return zp, zp_err, offsets, cov, fitted
