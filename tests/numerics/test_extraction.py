# SPDX-License-Identifier: BSD-3-Clause
"""Optimal extraction and wavelength resampling against an independent forward model.

Frames are drawn here from Gaussian traces (numerically pixel-integrated on a
sub-pixel grid, not the kernel's erf form), with Poisson photon noise, Gaussian
read noise, bad pixels and cosmic rays.
"""

import numpy as np
import pytest

from pipeline.numerics.extraction import (apply_fixed_weights, fixed_weight_extractor,
                                          optimal_extract, resample_to_grid)
from pipeline.numerics.traces import trace_profiles


def _profiles_subpixel(centres, sigma, n_y):
    sub = (np.arange(41) + 0.5) / 41 - 0.5
    y = np.arange(n_y)[None, :, None, None] + sub
    c = centres[:, None, :, None]
    g = np.exp(-0.5 * ((y - c) / sigma) ** 2) / (np.sqrt(2 * np.pi) * sigma)
    return g.mean(axis=-1)                               # (trace, y, x)


@pytest.mark.parametrize("spacing", [8.0, 4.0])
def test_fluxes_unbiased_and_errors_honest(rng, spacing):
    n_f, n_y, n_x, n_t = 200, 40, 16, 4
    x = np.arange(n_x)
    centres = (8 + spacing * np.arange(n_t))[:, None] + 0.02 * (x - 8)[None, :]
    sigma = 1.0
    true_flux = rng.uniform(500, 5000, (n_t, n_x))
    prof_true = _profiles_subpixel(centres, sigma, n_y)
    mean = np.einsum("kyx,kx->yx", prof_true, true_flux)
    rn = 5.0
    frames = rng.poisson(np.broadcast_to(mean, (n_f, n_y, n_x))) \
        + rng.normal(0, rn, (n_f, n_y, n_x))
    valid = np.ones((n_y, n_x), bool)
    valid[int(centres[1, 3]), 3] = False       # a bad pixel right on a trace centre
    frames[:, int(centres[1, 3]), 3] = 60000.0  # ... with garbage in it
    hit = (np.arange(n_f), rng.integers(0, n_y, n_f), rng.integers(0, n_x, n_f))
    frames[hit] += 3000.0                       # one cosmic ray per frame
    res = optimal_extract(frames, trace_profiles(centres, np.full_like(centres, sigma),
                                                 n_y=n_y), read_noise=rn, valid=valid)
    assert res.flux.shape == (n_f, n_t, n_x)
    # the bad pixel takes ~40% of one trace's profile in one column; a cosmic ray next to
    # it can push that column below the 50% coverage: a handful of cells at most
    assert res.valid.mean() > 0.99
    pull = (res.flux - true_flux) / np.sqrt(res.variance)
    pull = np.where(res.valid, pull, np.nan)
    # Unbiased: mean pull over 200 frames has standard error 0.07; 0.35 is 5 sigma
    # (per trace and column, 64 of them).
    assert np.max(np.abs(np.nanmean(pull, axis=0))) < 0.35
    # Honest errors: the pull's standard deviation is 1 within sampling (+-0.05 for
    # 200 frames x 64 cells, plus the model-variance approximation): common practice.
    assert abs(np.nanstd(pull) - 1) < 0.08
    # most cosmic rays that land on a trace (within 5 sigma of a centre) are found; the
    # others carry no profile weight and need not be
    on_trace = (np.abs(hit[1][:, None] - centres[:, hit[2]].T) < 5 * sigma).any(axis=1)
    assert res.n_rejected.sum() >= 0.9 * on_trace.sum()


def test_matches_horne_formula_single_trace(rng):
    """Single isolated trace, known variance: Horne's eq. f = sum(PD/V)/sum(P^2/V)."""
    n_y, n_x = 20, 6
    centres = np.full((1, n_x), 9.3)
    prof = trace_profiles(centres, np.full((1, n_x), 1.2), n_y=n_y)
    frames = rng.normal(100, 3, (3, n_y, n_x)) * prof[0] * 30
    res = optimal_extract(frames, prof, read_noise=4.0, n_iter=1, clip=50.0)
    v = 16.0 + np.maximum(frames, 0)
    horne = (prof[0] * frames / v).sum(axis=1) / (prof[0] ** 2 / v).sum(axis=1)
    np.testing.assert_allclose(res.flux[:, 0], horne, rtol=1e-10)
    np.testing.assert_allclose(res.variance[:, 0], 1 / (prof[0] ** 2 / v).sum(axis=1),
                               rtol=1e-10)


def test_masked_column_and_nan_policy():
    n_y, n_x = 20, 4
    prof = trace_profiles(np.full((1, n_x), 10.0), np.ones((1, n_x)), n_y=n_y)
    frames = 100 * prof.repeat(2, axis=0)
    valid = np.ones((n_y, n_x), bool)
    valid[:, 2] = False
    res = optimal_extract(frames, prof, read_noise=1.0, valid=valid)
    assert not res.valid[:, 0, 2].any() and np.isnan(res.flux[:, 0, 2]).all()
    np.testing.assert_allclose(res.flux[:, 0, [0, 1, 3]], 100, rtol=1e-6)
    frames[0, 10, 1] = np.nan
    with pytest.raises(ValueError, match="non-finite"):
        optimal_extract(frames, prof, read_noise=1.0)
    res = optimal_extract(frames, prof, read_noise=1.0, nan_policy="mask")
    assert np.isfinite(res.flux[0, 0, 1])


def test_resample_linear_exact_and_variance():
    """Two traces of different dispersion (0.040 and 0.036 um per pixel) seeing the same
    spectral density f(lambda), linear in wavelength: the per-pixel values are f * d;
    on a 0.01 um grid both must give f(g) * 0.01 um exactly (linear interpolation of a
    linear function)."""
    wp = np.array([2.0e-6 + 0.04e-6 * np.arange(11), 2.01e-6 + 0.036e-6 * np.arange(11)])
    disp = np.array([[0.04e-6], [0.036e-6]])

    def density(w):
        return 3.0 + 1e6 * w
    spec = density(wp) * disp
    var = np.ones_like(spec)
    grid = np.linspace(2.0e-6, 2.40e-6, 41)
    dg = 0.01e-6
    out, ov = resample_to_grid(spec[None], var[None], wp, grid, extrapolate_px=0.0)
    inside = (grid >= wp[:, :1]) & (grid <= wp[:, -1:])
    expect = density(grid)[None, :] * dg * np.ones((2, 1))
    np.testing.assert_allclose(out[0][inside], expect[inside], rtol=1e-12)
    assert np.isnan(out[0][~inside]).all()
    # variance of ((1-a) s0 / d + a s1 / d) dg with unit independent variances
    a = (grid[5] - wp[0, 1]) / (wp[0, 2] - wp[0, 1])
    assert abs(ov[0, 0, 5] - ((1 - a) ** 2 + a ** 2) * (dg / 0.04e-6) ** 2) < 1e-12
    outc, _ = resample_to_grid((spec + 1j * spec)[None], var[None], wp, grid, extrapolate_px=0.0)
    np.testing.assert_allclose(outc[0].imag[inside], out[0][inside])
    # half a pixel step of linear extrapolation: still exact for a linear spectrum
    ext, _ = resample_to_grid(spec[None], var[None], wp, grid, extrapolate_px=0.5)
    near = (grid >= wp[:, :1] - 0.5 * disp) & (grid <= wp[:, -1:] + 0.5 * disp)
    assert near.sum() > inside.sum()
    np.testing.assert_allclose(ext[0][near], expect[near], rtol=1e-12)
    assert np.isnan(ext[0][~near]).all()


@pytest.mark.parametrize("spacing", [8.0, 4.0])
def test_windowed_fit_equals_the_full_column_fit(rng, spacing):
    """Each trace fitted on its own rows gives the full-column normal equations' answer
    (the profile products outside a trace's rows are below 1e-7 of the peak)."""
    from pipeline.numerics.extraction import _fit_dense, _fit_windowed, _trace_windows
    n_f, n_y, n_x, n_t = 6, 60, 12, 8
    x = np.arange(n_x)
    centres = (8 + spacing * np.arange(n_t))[:, None] + 0.03 * (x - 6)[None, :]
    prof = trace_profiles(centres, np.full_like(centres, 1.1), n_y=n_y)
    mean = np.einsum("kyx,kx->yx", prof, rng.uniform(500, 5000, (n_t, n_x)))
    d = rng.poisson(np.broadcast_to(mean, (n_f, n_y, n_x))) + rng.normal(0, 5, (n_f, n_y, n_x))
    ok = np.ones(d.shape, bool)
    ok[:, int(centres[2, 4]), 4] = False
    rows = _trace_windows(prof)
    assert rows is not None and rows.shape[-1] < n_y / 2
    rn2 = np.full((n_y, n_x), 25.0)
    kw = dict(clip=50.0, n_iter=3, min_coverage=0.5)        # no outliers: same pixels used
    fw, vw, gw, _ = _fit_windowed(np.where(ok, d, 0), ok, rn2, prof, rows, **kw)
    fd, vd, gd, _ = _fit_dense(np.where(ok, d, 0), ok, rn2, prof, None, **kw)
    np.testing.assert_array_equal(gw, gd)
    np.testing.assert_allclose(fw, fd, rtol=1e-6)
    np.testing.assert_allclose(vw, vd, rtol=1e-6)


def test_fixed_weights_single_trace_is_horne_with_the_reference_variance(rng):
    """Isolated trace, weights fixed from a reference variance V: Horne's eq. with that V,
    f = sum(P D / V) / sum(P^2 / V) (Horne 1986, PASP 98, 609), in every frame."""
    n_y, n_x = 20, 6
    prof = trace_profiles(np.full((1, n_x), 9.3), np.full((1, n_x), 1.2), n_y=n_y)
    frames = rng.normal(100, 3, (5, n_y, n_x)) * prof[0] * 30
    v_ref = 16.0 + np.maximum(frames.mean(0), 0)
    flux, var, suspect = apply_fixed_weights(fixed_weight_extractor(prof, v_ref), frames,
                                             read_noise=4.0, clip=50.0)
    horne = (prof[0] * frames / v_ref).sum(axis=1) / (prof[0] ** 2 / v_ref).sum(axis=0)
    np.testing.assert_allclose(flux[:, 0], horne, rtol=1e-10)
    # variance: the operator's weights squared times each frame's own model variance
    a = (prof[0] / v_ref) / (prof[0] ** 2 / v_ref).sum(axis=0)
    model = flux[:, 0, None, :] * prof[0]
    np.testing.assert_allclose(var[:, 0], (a ** 2 * (16.0 + np.maximum(model, 0))).sum(axis=1),
                               rtol=1e-10)
    assert not suspect.any()


@pytest.mark.parametrize("spacing", [8.0, 4.0])
def test_fixed_weights_agree_with_optimal_extraction_on_a_modulated_lamp(rng, spacing):
    # A steady lamp whose traces are modulated frame by frame (fringes of a delay scan):
    # the fixed-weight fluxes are unbiased with honest errors, and differ from the
    # per-frame optimal extraction by a small fraction of the noise
    n_f, n_y, n_x, n_t = 120, 40, 16, 4
    x = np.arange(n_x)
    centres = (8 + spacing * np.arange(n_t))[:, None] + 0.02 * (x - 8)[None, :]
    prof = trace_profiles(centres, np.ones_like(centres), n_y=n_y)
    base = rng.uniform(2000, 8000, (n_t, n_x))
    mod = 1 + 0.8 * np.cos(rng.uniform(0, 2 * np.pi, (n_f, n_t, 1)) + 0.1 * x)
    true_flux = base * mod                                             # (frame, trace, x)
    mean = np.einsum("kyx,fkx->fyx", prof, true_flux)
    rn = 5.0
    frames = rng.poisson(mean) + rng.normal(0, rn, mean.shape)
    valid = np.ones((n_y, n_x), bool)
    valid[int(centres[1, 3]), 3] = False
    frames[:, int(centres[1, 3]), 3] = 60000.0                         # a bad pixel
    frames[7, int(round(centres[2, 5])), 5] += 5000.0                  # a cosmic ray
    ext = fixed_weight_extractor(prof, rn ** 2 + np.maximum(frames.mean(0), 0), valid=valid)
    flux, var, suspect = apply_fixed_weights(ext, frames, read_noise=rn)
    assert suspect[7] and suspect.sum() == 1                          # the cosmic ray only
    ok = np.ones(n_f, bool)
    ok[7] = False
    pull = (flux[ok] - true_flux[ok]) / np.sqrt(var[ok])
    # unbiased and honest, as for the optimal extraction (common practice: +-0.08)
    assert np.max(np.abs(pull.mean(axis=0))) < 0.45            # 5 sigma of a 119-frame mean
    assert abs(pull.std() - 1) < 0.08
    opt = optimal_extract(frames[ok], prof, read_noise=rn, valid=valid)
    diff = (flux[ok] - opt.flux) / np.sqrt(opt.variance)
    assert np.median(np.abs(diff)) < 0.05
    assert np.median(var[ok] / opt.variance) < 1.01             # nearly as precise
