# SPDX-License-Identifier: BSD-3-Clause
"""Sky-model formulas shared by the simulator and the binary fit.

Sign convention (README, "Conventions"), consistent with OIFITS v2
(Duvert, Young & Hummel 2017, A&A 597, A8):

    V(u, v) = sum_k F_k V_k exp(-2 pi i (u x_k + v y_k) / lambda) / sum_k F_k

with x = dRA cos(Dec) positive East and y = dDec positive North, in radians,
(u, v) in metres, lambda in metres. The simulator evaluates these formulas
on a fine wavelength grid inside each spectral channel (physical smearing);
the fit uses the analytic smearing envelope with the measured bandwidth.
"""

from __future__ import annotations

import numpy as np
from scipy.special import j1

__all__ = ["MAS", "point_phasor", "uniform_disk_visibility", "fibre_coupling",
           "smearing_envelope", "binary_visibility"]

MAS = np.pi / 180 / 3600e3
"""One milliarcsecond in radians."""


def point_phasor(u_m, v_m, wave_m, x_rad, y_rad):
    """exp(-2 pi i (u x + v y) / lambda) for a point source at (x, y). Broadcasts."""
    return np.exp(-2j * np.pi * (np.asarray(u_m) * x_rad + np.asarray(v_m) * y_rad)
                  / np.asarray(wave_m))


def uniform_disk_visibility(u_m, v_m, wave_m, diameter_rad):
    """Visibility of a uniform disk, 2 J1(pi theta rho) / (pi theta rho), rho = |b| / lambda.

    Real and signed (negative beyond the first null). Broadcasts. Standard formula
    (e.g. Born & Wolf, Principles of Optics, section 8.5.2).
    """
    rho = np.hypot(u_m, v_m) / np.asarray(wave_m)
    z = np.pi * np.asarray(diameter_rad) * rho
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(np.abs(z) < 1e-8, 1.0 - z ** 2 / 8, 2 * j1(z) / np.where(z == 0, 1, z))
    return out


def fibre_coupling(x_rad, y_rad, wave_m, fwhm_rad_at_2p2um: float):
    """Relative coupling of a point source at (x, y) from the fibre centre into a
    single-mode fibre: Gaussian in intensity, FWHM proportional to wavelength.

    The Gaussian approximation of the fibre mode overlap is common practice
    (Shaklan & Roddier 1988, Appl. Opt. 27, 2334 for the mode-overlap integral).
    """
    fwhm = fwhm_rad_at_2p2um * np.asarray(wave_m) / 2.2e-6
    r2 = np.asarray(x_rad) ** 2 + np.asarray(y_rad) ** 2
    return np.exp(-4 * np.log(2) * r2 / fwhm ** 2)


def smearing_envelope(opd_m, wave_m, bandwidth_m):
    """Fringe-contrast envelope of a channel with a Gaussian spectral profile.

    For a channel centred on wavenumber sigma = 1/lambda with FWHM
    delta_sigma = bandwidth / lambda^2, the coherence envelope at path
    difference opd is exp(-(pi delta_sigma opd)^2 / (4 ln 2)) (Fourier pair of
    a Gaussian).
    """
    dsig = np.asarray(bandwidth_m) / np.asarray(wave_m) ** 2
    return np.exp(-(np.pi * dsig * np.asarray(opd_m)) ** 2 / (4 * np.log(2)))


def binary_visibility(u_m, v_m, wave_m, *, dx_rad, dy_rad, flux_ratio,
                      x1_rad=0.0, y1_rad=0.0, diameter1_rad=0.0, diameter2_rad=0.0,
                      bandwidth_m=None, fibre_fwhm_rad_at_2p2um=None):
    """Complex visibility of a binary: primary at (x1, y1), companion at (x1+dx, y1+dy).

    Parameters
    ----------
    u_m, v_m : array_like, metres (broadcast with wave_m)
    wave_m : array_like, metres
    dx_rad, dy_rad : float, companion minus primary, radians (East, North)
    flux_ratio : float or array_like (per wavelength)
        True companion/primary flux ratio on the sky (before fibre coupling).
    x1_rad, y1_rad : float, primary offset from the fibre (phase) centre, radians
    diameter1_rad, diameter2_rad : float, uniform-disk diameters, radians
    bandwidth_m : array_like or None, channel FWHM bandwidth; None for monochromatic
    fibre_fwhm_rad_at_2p2um : float or None; None for no fibre attenuation

    Returns
    -------
    vis : ndarray, complex, broadcast shape
    """
    x2, y2 = x1_rad + dx_rad, y1_rad + dy_rad
    f1 = np.ones_like(np.asarray(wave_m, float))
    f2 = np.asarray(flux_ratio) * f1
    if fibre_fwhm_rad_at_2p2um is not None:
        f1 = f1 * fibre_coupling(x1_rad, y1_rad, wave_m, fibre_fwhm_rad_at_2p2um)
        f2 = f2 * fibre_coupling(x2, y2, wave_m, fibre_fwhm_rad_at_2p2um)
    v1 = point_phasor(u_m, v_m, wave_m, x1_rad, y1_rad)
    v2 = point_phasor(u_m, v_m, wave_m, x2, y2)
    if diameter1_rad:
        v1 = v1 * uniform_disk_visibility(u_m, v_m, wave_m, diameter1_rad)
    if diameter2_rad:
        v2 = v2 * uniform_disk_visibility(u_m, v_m, wave_m, diameter2_rad)
    if bandwidth_m is not None:
        v1 = v1 * smearing_envelope(np.asarray(u_m) * x1_rad + np.asarray(v_m) * y1_rad,
                                    wave_m, bandwidth_m)
        v2 = v2 * smearing_envelope(np.asarray(u_m) * x2 + np.asarray(v_m) * y2,
                                    wave_m, bandwidth_m)
    return (f1 * v1 + f2 * v2) / (f1 + f2)
