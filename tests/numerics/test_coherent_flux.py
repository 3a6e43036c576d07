# SPDX-License-Identifier: BSD-3-Clause
"""P2VM application against an independent forward model of the combiner.

The forward model below is written from the combiner equation of DEVELOPERS.md
("Conventions"), independently of the calibration code:
I_k = sum_i t_ki F_i + 2 sqrt(t_ki t_kj) c_k (Re C_ij cos theta_k - Im C_ij sin theta_k).
"""

import numpy as np
import pytest

from pipeline.numerics.coherent_flux import counts_to_rate, invert_combiner, traces_to_outputs

BASELINES = [(0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3)]


def true_v2pm(rng, n_pol, n_wave):
    """A perturbed 24x16 V2PM per pol and wavelength, shape (pol, wave, output, unknown)."""
    n_out = 24
    pair = np.repeat(np.array(BASELINES), 4, axis=0)
    base = np.repeat(np.arange(6), 4)
    theta = np.deg2rad(np.tile([0, 90, 180, 270], 6))[None, None] + np.deg2rad(
        rng.uniform(-10, 10, (n_pol, n_wave, n_out)))
    c = rng.uniform(0.8, 0.98, (n_pol, n_wave, n_out))
    t = np.zeros((n_pol, n_wave, n_out, 4))
    for k, (i, j) in enumerate(pair):
        t[..., k, i] = rng.uniform(0.8, 1.2, (n_pol, n_wave)) / 12
        t[..., k, j] = rng.uniform(0.8, 1.2, (n_pol, n_wave)) / 12
    v = np.zeros((n_pol, n_wave, n_out, 16))
    v[..., :4] = t
    for k, (i, j) in enumerate(pair):
        amp = 2 * np.sqrt(t[..., k, i] * t[..., k, j]) * c[..., k]
        v[..., k, 4 + base[k]] = amp * np.cos(theta[..., k])
        v[..., k, 10 + base[k]] = -amp * np.sin(theta[..., k])
    return v


def forward(v2pm, flux, coherent):
    """flux (frame, pol, 4, wave), coherent (frame, pol, 6, wave) -> I (frame, pol, 24, wave)."""
    x = np.concatenate([flux, coherent.real, coherent.imag], axis=2)
    return np.einsum("pwou,fpuw->fpow", v2pm, x)


@pytest.mark.parametrize("n_pol", [1, 2])
def test_recovers_fluxes_and_visibilities_within_noise(rng, n_pol):
    n_frame, n_wave = 400, 5
    v2pm = true_v2pm(rng, n_pol, n_wave)
    p2vm = np.linalg.pinv(v2pm)                      # (pol, wave, 16, 24), unweighted
    flux = rng.uniform(5e4, 1e5, (1, n_pol, 4, n_wave)) * np.ones((n_frame, 1, 1, 1))
    vis = rng.uniform(0.3, 1.0, (6, n_wave)) * np.exp(1j * rng.uniform(-np.pi, np.pi, (6, n_wave)))
    i, j = np.array(BASELINES).T
    coh = np.sqrt(flux[:, :, i] * flux[:, :, j]) * vis
    clean = forward(v2pm, flux, coh)
    sigma = np.sqrt(clean + 50.0 ** 2)               # photon + read noise (e-)
    noisy = clean + sigma * rng.standard_normal(clean.shape)
    out = invert_combiner(noisy, p2vm, variance=sigma ** 2)
    assert out.flux.shape == (n_frame, n_pol, 4, n_wave)
    assert out.coherent.shape == (n_frame, n_pol, 6, n_wave)
    assert out.coherent.dtype == np.complex128
    # exact without noise (linear algebra, pinv of a full-rank 24x16 matrix)
    exact = invert_combiner(clean, p2vm)
    np.testing.assert_allclose(exact.flux, flux, rtol=1e-9)
    np.testing.assert_allclose(exact.coherent, coh, rtol=1e-9, atol=1e-6 * flux.max())
    # with noise: the frame mean agrees within 5 standard errors of the mean
    err = np.sqrt(out.coherent_var.mean(0) / n_frame)
    assert np.all(np.abs(out.coherent.mean(0) - coh[0]) < 5 * np.sqrt(2) * err)
    # predicted variances match the scatter over frames: with 400 frames the
    # sample variance has a relative error sqrt(2/399) ~ 7 %, so 30 % is > 4 sigma
    ratio_re = out.coherent.real.var(0) / out.coherent_var.mean(0)
    ratio_im = out.coherent.imag.var(0) / out.coherent_var.mean(0)
    ratio_f = out.flux.var(0) / out.flux_var.mean(0)
    for r in (ratio_re, ratio_im, ratio_f):
        assert np.all(np.abs(r - 1) < 0.3)
    # |V| recovered from the frame-averaged fluxes (standard definition V = C / sqrt(Fi Fj))
    v_est = out.coherent.mean(0) / np.sqrt(out.flux.mean(0)[:, i] * out.flux.mean(0)[:, j])
    np.testing.assert_allclose(v_est, np.broadcast_to(vis, v_est.shape), atol=0.01)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_dtypes(rng, dtype):
    # FT counts arrive as float32: the solution is computed and returned in float64
    v2pm = true_v2pm(rng, 1, 3)
    x = rng.uniform(100, 200, (5, 1, 24, 3)).astype(dtype)
    out = invert_combiner(x, np.linalg.pinv(v2pm).astype(dtype), variance=x)
    assert out.flux.dtype == np.float64 and out.coherent.dtype == np.complex128
    assert out.coherent_var.dtype == np.float64 and (out.coherent_var > 0).all()


def test_trace_order_output_major():
    # DEVELOPERS.md: a trace index is output * n_pol + pol
    tr = np.arange(48)[None, :, None] * np.ones((3, 1, 7))
    out = traces_to_outputs(tr, 2)
    assert out.shape == (3, 2, 24, 7)
    assert out[0, 1, 5, 0] == 5 * 2 + 1
    assert traces_to_outputs(tr[:, :24], 1)[0, 0, 23, 0] == 23
    with pytest.raises(ValueError, match="polarisations"):
        traces_to_outputs(tr[:, :23], 2)


def test_counts_to_rate_noise_model():
    # Poisson: variance in electrons equals the mean; read noise adds in quadrature
    rate, var = counts_to_rate(np.array([600.0, 400.0]), 500.0, gain_e_per_adu=2.0,
                               read_noise_adu=3.0, dit_s=0.5)
    np.testing.assert_allclose(rate, [400.0, -400.0])
    np.testing.assert_allclose(var, [(200 + 36) / 0.25, 36 / 0.25])


def test_counts_to_rate_mean_poisson(rng):
    # pure read noise (1 e-): the variance of the values is 1 e-^2; the per-frame
    # Poisson term max(e, 0) would add E[max(e, 0)] = 1/sqrt(2 pi) ~ 0.4 (half-normal mean)
    counts = 500.0 + rng.standard_normal((20000, 3))
    _, var_f = counts_to_rate(counts, 500.0, gain_e_per_adu=1.0, read_noise_adu=1.0, dit_s=1.0)
    _, var_m = counts_to_rate(counts, 500.0, gain_e_per_adu=1.0, read_noise_adu=1.0, dit_s=1.0,
                              poisson="mean")
    assert var_f.mean() == pytest.approx(1 + 1 / np.sqrt(2 * np.pi), rel=0.02)
    assert var_m.mean() == pytest.approx(1.0, abs=0.02)   # mean of 20000 values ~ +-0.007
    with pytest.raises(ValueError, match="poisson"):
        counts_to_rate(counts, 0.0, gain_e_per_adu=1.0, read_noise_adu=1.0, dit_s=1.0,
                       poisson="median")


def test_nan_policy(rng):
    v2pm = true_v2pm(rng, 1, 2)
    p2vm = np.linalg.pinv(v2pm)
    x = rng.uniform(1, 2, (3, 1, 24, 2))
    x[1, 0, 3, 1] = np.nan
    with pytest.raises(ValueError, match="non-finite"):
        invert_combiner(x, p2vm)
    out = invert_combiner(x, p2vm, nan_policy="propagate")
    bad = ~np.isfinite(out.coherent)
    assert bad[1, :, :, 1].all() and bad.sum() == 6        # only that frame and wavelength
    with pytest.raises(ValueError, match="p2vm"):
        invert_combiner(x[..., :1], p2vm)
