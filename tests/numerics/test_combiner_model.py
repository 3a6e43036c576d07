# SPDX-License-Identifier: BSD-3-Clause
"""The visibility-to-pixel model against an independent forward model of the combiner.

The forward model here evaluates, output by output, the combiner equation of
DEVELOPERS.md written with complex numbers,
I_k = t_ki F_i + t_kj F_j + 2 sqrt(t_ki t_kj) c_k Re[C_ij exp(i theta_k)],
without the kernel's matrix layout.
"""

import numpy as np
import pytest
from scipy.linalg import lstsq

from pipeline.numerics.combiner_model import (build_v2pm, condition_number, contrast_and_phase,
                                              model_residuals, output_noise_weights,
                                              phase_set_qc, smooth_transmissions,
                                              transmissions, weighted_pinv)

BASELINES = [(0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3)]
PAIRS = np.repeat(np.array(BASELINES), 4, axis=0)          # output k -> baseline k // 4
NOMINAL = np.deg2rad(np.tile([0.0, 90.0, 180.0, 270.0], 6))


def _true_combiner(rng, n_pol=1, n_wave=5):
    t = np.zeros((n_pol, 24, 4, n_wave))
    for k, (i, j) in enumerate(PAIRS):
        t[:, k, i] = rng.uniform(0.8, 1.2, (n_pol, 1)) / 12 * (1 + 0.05 * np.linspace(-1, 1, n_wave))
        t[:, k, j] = rng.uniform(0.8, 1.2, (n_pol, 1)) / 12
    c = rng.uniform(0.8, 0.98, (n_pol, 24, n_wave))
    th = NOMINAL[None, :, None] + np.deg2rad(rng.uniform(-10, 10, (n_pol, 24, n_wave)))
    return t, c, th


def _forward(t, c, th, flux, coh):
    """flux (pol, tel, wave), coh complex (pol, baseline, wave) -> (pol, output, wave)."""
    out = np.zeros(t.shape[:2] + t.shape[3:])
    for k, (i, j) in enumerate(PAIRS):
        b = BASELINES.index((i, j))
        out[:, k] = (t[:, k, i] * flux[:, i] + t[:, k, j] * flux[:, j]
                     + 2 * np.sqrt(t[:, k, i] * t[:, k, j]) * c[:, k]
                     * np.real(coh[:, b] * np.exp(1j * th[:, k])))
    return out


def test_v2pm_inverts_forward_model(rng):
    t, c, th = _true_combiner(rng, n_pol=2)
    v2pm = build_v2pm(t, c, th, PAIRS)
    assert v2pm.shape == (2, 5, 24, 16)
    flux = rng.uniform(1e3, 2e3, (2, 4, 5))
    vis = rng.uniform(0.2, 1, (2, 6, 5)) * np.exp(1j * rng.uniform(-np.pi, np.pi, (2, 6, 5)))
    coh = np.stack([np.sqrt(flux[:, i] * flux[:, j]) for i, j in BASELINES], 1) * vis
    intensity = _forward(t, c, th, flux, coh)
    x = np.einsum("pwuk,pkw->puw", weighted_pinv(v2pm), intensity)
    # noiseless, well-conditioned 24 x 16 system: exact to rounding
    np.testing.assert_allclose(x[:, :4], flux, rtol=1e-9)
    np.testing.assert_allclose(x[:, 4:10] + 1j * x[:, 10:], coh, rtol=1e-9, atol=1e-9)
    assert np.all(condition_number(v2pm) < 20)     # ABCD with <10 deg errors: well conditioned


def test_weighted_pinv_is_weighted_least_squares(rng):
    t, c, th = _true_combiner(rng, n_wave=1)
    m = build_v2pm(t, c, th, PAIRS)[0, 0]
    w = rng.uniform(0.1, 2.0, 24)
    y = rng.normal(size=24)
    p = weighted_pinv(m, weights=w)
    # weighted least squares by scipy on the whitened system (independent route)
    ref = lstsq(np.sqrt(w)[:, None] * m, np.sqrt(w) * y)[0]
    np.testing.assert_allclose(p @ y, ref, rtol=1e-9, atol=1e-12)
    wts = output_noise_weights(m[None, None], read_noise_var=4.0)
    np.testing.assert_allclose(wts[0, 0], 1 / (m[:, :4].sum(1) + 4.0))


def test_transmissions_contrast_phase_from_lamp(rng):
    t, c, th = _true_combiner(rng, n_pol=1)
    lamp = np.array([1.0, 1.1, 0.9, 1.05])[None, :, None] * 1e5 * np.ones((1, 4, 5))
    # single-beam frames: only telescope i lit
    beam = np.stack([_forward(t, c, th, lamp * (np.arange(4) == i)[None, :, None],
                              np.zeros((1, 6, 5), complex)) for i in range(4)])
    t_est = transmissions(beam)
    t_share = t / t.sum(axis=1, keepdims=True)     # the documented normalisation
    np.testing.assert_allclose(t_est, t_share, rtol=1e-12)
    # scan at zero OPD with a lamp of visibility 1: C_ij = sqrt(F_i F_j)
    coh = np.stack([np.sqrt(lamp[:, i] * lamp[:, j]) for i, j in BASELINES], 1).astype(complex)
    dc = _forward(t, c, th, lamp, np.zeros_like(coh))
    # fringe phasor Z_k: the output's fringe term is Re[Z_k exp(-2 pi i opd/lambda)]
    z = np.stack([2 * np.sqrt(t[:, k, i] * t[:, k, j]) * c[:, k] * coh[:, BASELINES.index((i, j))]
                  * np.exp(1j * th[:, k]) for k, (i, j) in enumerate(PAIRS)], 1)
    c_est, th_est, flux = contrast_and_phase(z, dc, t_est, PAIRS)
    np.testing.assert_allclose(c_est, c, rtol=1e-9)
    np.testing.assert_allclose(np.angle(np.exp(1j * (th_est - th))), 0, atol=1e-12)
    np.testing.assert_allclose(flux, lamp * t.sum(axis=1), rtol=1e-9)


def test_residuals_and_phase_qc(rng):
    t, c, th = _true_combiner(rng)
    v2pm = build_v2pm(t, c, th, PAIRS)
    flux = np.full((1, 4, 5), 1e4)
    coh = np.full((1, 6, 5), 5e3 + 2e3j)
    i = _forward(t, c, th, flux, coh)[None]
    noisy = i + rng.normal(0, 1, (200,) + i.shape[1:]) * np.sqrt(i)
    p2vm = weighted_pinv(v2pm, weights=1 / i[0].transpose(0, 2, 1))
    res, chi2 = model_residuals(v2pm, p2vm, noisy, variance=np.broadcast_to(i, noisy.shape))
    # photon noise, weighted fit: chi2 per degree of freedom ~ 1 (200 x 8 dof: +-0.035
    # per wave; 0.15 is 4 sigma)
    np.testing.assert_allclose(chi2, 1.0, atol=0.15)
    closure, imbalance, off = phase_set_qc(th, NOMINAL)
    np.testing.assert_allclose(closure, 0, atol=1e-12)   # +-10 deg errors keep the order
    ideal = phase_set_qc(np.broadcast_to(NOMINAL[None, :, None], th.shape), NOMINAL)
    np.testing.assert_allclose(ideal[1], 0, atol=1e-12)  # perfect ABCD: phasors sum to 0
    np.testing.assert_allclose(ideal[2], 0, atol=1e-12)
    assert np.all(off < np.deg2rad(12)) and np.all(off > 0)
    swapped = th.copy()
    swapped[:, [1, 2]] = th[:, [2, 1]]
    assert np.all(np.abs(phase_set_qc(swapped, NOMINAL)[0][:, 0]) > 6)   # order broken: 2 pi


def test_nan_propagates_to_its_wavelength_only(rng):
    t, c, th = _true_combiner(rng)
    t[0, 3, 0, 2] = np.nan                       # one transmission unknown at wave 2
    dc = np.ones((1, 24, 5))
    c_est, th_est, flux = contrast_and_phase(np.ones((1, 24, 5), complex), dc, t, PAIRS)
    assert np.isnan(flux[0, :, 2]).all() and np.isfinite(flux[0, :, [0, 1, 3, 4]]).all()
    p2vm = weighted_pinv(build_v2pm(t, c, th, PAIRS))
    assert np.isnan(p2vm[0, 2]).all() and np.isfinite(p2vm[0, [0, 1, 3, 4]]).all()
    assert np.isnan(condition_number(build_v2pm(t, c, th, PAIRS))[0, 2])


def test_smooth_transmissions_averages_photon_noise(rng):
    """Shares that are cubic in wavelength plus white noise: the fitted polynomial is
    numpy's weighted least-squares fit (independent route: numpy.polynomial.polyfit on
    one column), keeps sum over outputs = 1, and cuts the noise by about
    sqrt((deg + 1) / n_wave) (least-squares variance of a polynomial, common knowledge)."""
    n_wave, deg = 200, 3
    wave = np.linspace(1.95e-6, 2.45e-6, n_wave)
    xi = (wave - 2.2e-6) / 0.25e-6
    raw = np.zeros((1, 24, 4, n_wave))
    for k, (i, j) in enumerate(PAIRS):
        for tel in (i, j):
            c = rng.uniform(-0.05, 0.05, 4) * [1, 1, 0.5, 0.2]
            raw[0, k, tel] = (1 + rng.uniform(-0.2, 0.2)) * (1 + c[1] * xi + c[2] * xi ** 2
                                                           + c[3] * xi ** 3)
    true = raw / raw.sum(axis=1, keepdims=True)
    noisy = true * (1 + 0.01 * rng.standard_normal(true.shape))
    noisy[0, 5, PAIRS[5, 0], 17] = np.nan                 # one lost channel: filled
    sm = smooth_transmissions(noisy, wave, deg=deg)
    np.testing.assert_allclose(np.nansum(sm, axis=1)[:, [0, 1, 2, 3]], 1.0, rtol=1e-12)
    k = np.arange(24)
    err_raw = np.nanstd(noisy[0, k, PAIRS[:, 0]] / true[0, k, PAIRS[:, 0]] - 1)
    err_sm = np.std(sm[0, k, PAIRS[:, 0]] / true[0, k, PAIRS[:, 0]] - 1)
    assert np.isfinite(sm[0, 5, PAIRS[5, 0], 17])
    assert err_sm < 2.0 * err_raw * np.sqrt((deg + 1) / n_wave)      # ~0.14 x
    # one column against numpy's own fit (before the renormalisation, which is ~1e-4 here)
    x = 2 * (wave - wave.mean()) / np.ptp(wave)
    ref = np.polynomial.polynomial.polyval(x, np.polynomial.polynomial.polyfit(
        x, noisy[0, 0, PAIRS[0, 0]], deg))
    np.testing.assert_allclose(sm[0, 0, PAIRS[0, 0]], ref, rtol=2e-3)
    with pytest.raises(ValueError, match="degree"):
        smooth_transmissions(noisy, wave, deg=-1)
    few = noisy.copy()
    few[0, 3, PAIRS[3, 1], 3:] = np.nan                   # 3 finite channels < deg + 1
    assert np.isnan(smooth_transmissions(few, wave, deg=deg)[0, :, PAIRS[3, 1]]).all()
