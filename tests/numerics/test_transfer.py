# SPDX-License-Identifier: BSD-3-Clause
"""Calibrator model and transfer function."""

import numpy as np
import pytest
from scipy.special import j1

from pipeline.numerics.transfer import (calibrate_phase, calibrate_vis2, interpolate_in_time,
                                        interpolate_phase_in_time, transfer_function,
                                        uniform_disk_vis2)
from pipeline.skymodel import MAS


def test_uniform_disk_against_scipy_j1():
    """V = 2 J1(x) / x with x = pi theta b / lambda, written here with scipy.special.j1
    (standard formula, e.g. Born & Wolf, Principles of Optics, section 8.5.2)."""
    b = np.linspace(5.0, 130.0, 40)
    wave = 2.2e-6
    theta_mas = 1.3
    vis, vis2, _ = uniform_disk_vis2(b, 0 * b, wave, theta_mas)
    x = np.pi * theta_mas * MAS * b / wave
    np.testing.assert_allclose(vis, 2 * j1(x) / x, rtol=1e-12)    # exact same function
    np.testing.assert_allclose(vis2, (2 * j1(x) / x) ** 2, rtol=1e-12)


def test_uniform_disk_first_null():
    """First null of 2 J1(x)/x at x = 3.8317 (first zero of J1, handbook value
    quoted from memory; Abramowitz & Stegun 1964, table 9.5)."""
    wave, theta_mas = 2.2e-6, 5.0
    b_null = 3.8317 * wave / (np.pi * theta_mas * MAS)
    _, vis2, _ = uniform_disk_vis2(b_null, 0.0, wave, theta_mas)
    assert vis2 < 1e-8     # 4-digit handbook value: V ~ 1e-5 at most


def test_uniform_disk_error_propagation_against_finite_differences():
    """sigma(V2) = |dV2/dtheta| sigma_theta, checked with a central difference."""
    u, v, wave = np.array([30.0, 80.0, 120.0]), np.array([10.0, -40.0, 5.0]), 2.1e-6
    theta, dtheta = 2.0, 0.1
    _, _, err = uniform_disk_vis2(u, v, wave, theta, dtheta)
    h = 1e-4
    _, vp, _ = uniform_disk_vis2(u, v, wave, theta + h)
    _, vm, _ = uniform_disk_vis2(u, v, wave, theta - h)
    np.testing.assert_allclose(err, np.abs(vp - vm) / (2 * h) * dtheta, rtol=1e-6)
    with pytest.raises(ValueError, match="diameter"):
        uniform_disk_vis2(u, v, wave, -1.0)


def test_transfer_function_and_calibration_roundtrip():
    t, terr = transfer_function(0.45, 0.01, 0.9, 0.009)
    assert t == pytest.approx(0.5)
    assert terr == pytest.approx(0.5 * np.hypot(0.01 / 0.45, 0.01))   # quadrature
    v2, v2err = calibrate_vis2(0.3, 0.0, t, 0.0)
    assert v2 == pytest.approx(0.6)


def test_linear_interpolation_in_time():
    """Linear between bracketing calibrators, constant outside, errors propagated
    with the interpolation weights (independent calibrators)."""
    t_cal = np.array([0.0, 1.0, 3.0])
    tf = np.array([[0.8, 0.6], [0.7, 0.5], [0.9, 0.9]])        # (cal, wave)
    err = np.array([[0.01, 0.01], [0.02, 0.02], [0.04, 0.04]])
    v, e = interpolate_in_time(t_cal, tf, err, np.array([0.5, 2.0, -1.0, 5.0]))
    np.testing.assert_allclose(v[0], [0.75, 0.55])
    np.testing.assert_allclose(v[1], [0.8, 0.7])
    np.testing.assert_allclose(v[2], tf[0])
    np.testing.assert_allclose(v[3], tf[2])
    np.testing.assert_allclose(e[0], np.hypot(0.5 * 0.01, 0.5 * 0.02))
    np.testing.assert_allclose(e[1], np.hypot(0.5 * 0.02, 0.5 * 0.04))
    vn, en = interpolate_in_time(t_cal, tf, err, [0.4, 2.1], method="nearest")
    np.testing.assert_allclose(vn, tf[[0, 2]])
    np.testing.assert_allclose(en, err[[0, 2]])
    # a linear trend is reproduced exactly
    tl = np.array([0.0, 2.0])
    vl, _ = interpolate_in_time(tl, 0.5 + 0.1 * tl, 0 * tl, np.array([0.3, 1.7]))
    np.testing.assert_allclose(vl, 0.5 + 0.1 * np.array([0.3, 1.7]))
    with pytest.raises(ValueError, match="sorted"):
        interpolate_in_time([1.0, 0.0], tf[:2], err[:2], 0.5)


def test_phase_zero_point_interpolation_across_pi():
    """Zero points near +-pi interpolate along the short arc."""
    zp, _ = interpolate_phase_in_time([0.0, 1.0], np.array([3.1, -3.1]), np.array([0.1, 0.1]),
                                      [0.5])
    assert abs(abs(zp[0]) - np.pi) < 1e-9
    ph, err = calibrate_phase(np.array([-3.0]), 0.1, 3.0, 0.1)
    np.testing.assert_allclose(ph, [2 * np.pi - 6.0])
    np.testing.assert_allclose(err, np.hypot(0.1, 0.1))


def test_phase_zero_point_fit_recovers_calibrator_offsets(rng):
    """Two calibrator stars, three exposures each over a few hours: the constant
    instrumental phase and each star's pointing offset come back within their errors
    (forward model written here: phase of a point source at (x, y) is
    -2 pi (u x + v y) / lambda, the convention of pipeline.skymodel)."""
    from pipeline.geometry import uvw_from_enu
    from pipeline.numerics.transfer import fit_phase_zero_point
    enu = np.array([[0, 0, 0], [46.2, 21.0, 0.3], [20.0, -60.0, -0.2], [-58.0, 40.0, 0.5]])
    pairs = ((0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3))
    b_enu = np.array([enu[j] - enu[i] for i, j in pairs])
    lat = np.deg2rad(-37.41)
    wave = np.linspace(2.0e-6, 2.4e-6, 8)
    phi = rng.uniform(-np.pi, np.pi, (1, 6, 8))
    offsets = np.array([[0.5, 0.3], [-0.4, 0.7]]) * MAS
    star = np.array([0, 1, 0, 1, 0, 1])
    ha = np.array([-1.5, -1.0, -0.3, 0.2, 0.8, 1.4])            # rad
    dec = np.deg2rad(np.where(star == 0, -30.5, -20.0))
    uvw = np.array([uvw_from_enu(b_enu, h, d, lat)[0] for h, d in zip(ha, dec)])
    u, v = uvw[..., 0], uvw[..., 1]
    model = phi[None] - 2 * np.pi * (u[:, None, :, None] * offsets[star, 0][:, None, None, None]
                                     + v[:, None, :, None] * offsets[star, 1][:, None, None, None]
                                     ) / wave
    err = np.full(model.shape, 0.02)
    psi = np.angle(np.exp(1j * (model + rng.normal(0, 0.02, model.shape))))
    zp, zp_err, off, cov, fitted = fit_phase_zero_point(psi, err, u, v, wave, star)
    assert fitted
    d = (off[0].ravel() - offsets.ravel()) / np.sqrt(np.diag(cov[0]))
    assert np.all(np.abs(d) < 4)                      # 4 Gaussian parameters, 4 sigma
    assert np.sqrt(np.diag(cov[0])).max() < 0.05 * MAS
    pull = np.angle(np.exp(1j * (zp - phi))) / zp_err
    assert np.all(np.abs(pull) < 4.5)                 # 48 values
    # a single exposure cannot separate offset and zero point: offsets 0, zp = its phase
    zp1, _, off1, _, fitted1 = fit_phase_zero_point(psi[:1], err[:1], u[:1], v[:1], wave,
                                                    star[:1])
    assert not fitted1 and np.all(off1 == 0)
    np.testing.assert_allclose(zp1, psi[0], atol=1e-12)
