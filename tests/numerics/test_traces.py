# SPDX-License-Identifier: BSD-3-Clause
"""Trace finding, cross-profiles and pixel response against an independent forward model.

The forward model here draws each trace as a Gaussian sampled on a 25-point
sub-pixel grid and averaged (a numerical pixel integration, independent of the
kernel's erf form), with known tilt/curvature, pixel response and bad pixels.
"""

import numpy as np
import pytest

from pipeline.numerics.traces import (combine_valid, find_traces, fit_amplitudes,
                                      pixel_response, trace_profiles)


def _draw_flat(rng, *, n_y, n_x, centres, sigmas, amps, prnu=0.0, bkg=0.0):
    """centres, sigmas, amps: (trace, x). Returns noiseless image and response."""
    sub = (np.arange(25) + 0.5) / 25 - 0.5
    y = np.arange(n_y)[:, None, None] + sub[None, None, :]          # (y, 1, sub)
    img = np.full((n_y, n_x), float(bkg))
    for c, s, a in zip(centres, sigmas, amps):
        g = np.exp(-0.5 * ((y - c[None, :, None]) / s[None, :, None]) ** 2)
        img += a[None, :] * g.mean(axis=2) / (np.sqrt(2 * np.pi) * s[None, :])
    resp = 1 + prnu * rng.standard_normal((n_y, n_x))
    return img, resp


@pytest.mark.parametrize("spacing", [8.0, 4.0])   # joint and split polarisation layouts
def test_find_traces_recovers_tilt_and_width(rng, spacing):
    n_y, n_x, n_t = 120, 64, 12
    x = np.arange(n_x)
    nominal = 10 + spacing * np.arange(n_t)
    # true law: offset + tilt + curvature, different per trace
    off = rng.uniform(-0.8, 0.8, n_t)
    tilt = rng.uniform(-0.01, 0.01, n_t)
    centres = nominal[:, None] + off[:, None] + tilt[:, None] * (x - 32) \
        + 2e-4 * (x - 32) ** 2
    sigmas = np.repeat(rng.uniform(0.9, 1.1, n_t)[:, None], n_x, axis=1) + 1e-3 * (x - 32)
    amps = 2e5 * (1 + 0.3 * np.sin(x / 10))[None, :] * rng.uniform(0.7, 1.3, (n_t, 1))
    img, resp = _draw_flat(rng, n_y=n_y, n_x=n_x, centres=centres, sigmas=sigmas, amps=amps,
                           prnu=0.01, bkg=5.0)
    data = rng.poisson(img * resp).astype(float)
    valid = np.ones(data.shape, bool)
    valid[rng.integers(0, n_y, 20), rng.integers(0, n_x, 20)] = False
    data[~valid] = 0.0
    fit = find_traces(data, nominal, valid=valid, read_noise=3.0)
    # Per-column centre scatter is ~0.01 px here (1% PRNU dominates photon noise); a
    # quadratic over 64 columns has an end-point error ~ 0.4 x that, and we take the
    # maximum over 12 traces x 64 columns: 0.02 px bounds it (>4 sigma).
    assert np.max(np.abs(fit.trace_y - centres)) < 0.02
    # Width: same reasoning, ~sqrt(2) worse than the centre: 2% of sigma.
    assert np.max(np.abs(fit.profile_sigma / sigmas - 1)) < 0.02
    assert fit.centre_residual_rms.max() < 0.05
    assert fit.trace_y.shape == (n_t, n_x)


def test_profiles_and_pixel_response(rng):
    n_y, n_x, n_t = 60, 32, 6
    x = np.arange(n_x)
    centres = (8 + 8 * np.arange(n_t))[:, None] + 0.005 * (x - 16)[None, :]
    sigmas = np.full((n_t, n_x), 1.05)
    amps = np.full((n_t, n_x), 5e5)
    img, resp = _draw_flat(rng, n_y=n_y, n_x=n_x, centres=centres, sigmas=sigmas, amps=amps,
                           prnu=0.02)
    # profile sums to 1 over y (normalisation of a pixel-integrated Gaussian)
    prof = trace_profiles(centres, sigmas, n_y=n_y)
    np.testing.assert_allclose(prof.sum(axis=1), 1.0, atol=1e-9)
    # profile against the independent sub-pixel model (25-point midpoint rule: error
    # ~ (1/25)^2 / 24 of the second derivative, below 1e-4)
    ref, _ = _draw_flat(rng, n_y=n_y, n_x=n_x, centres=centres[:1], sigmas=sigmas[:1],
                        amps=np.ones((1, n_x)))
    np.testing.assert_allclose(prof[0], ref, atol=1e-4)
    data = img * resp     # noiseless: response must come back exactly where lit
    r, lamp = pixel_response(data, centres, sigmas)
    lit = img > 0.05 * img.max(axis=0)
    # The amplitude of each trace in each column absorbs the response-weighted mean of
    # its lit pixels, so the recovered response equals truth up to one factor per
    # (trace, column): within each group the ratio must be constant (noiseless data;
    # 1e-2, against a typical 5% spread of the 2% PRNU over 5 pixels, allows for the
    # fitted background, which couples to the wings).
    group = np.rint((np.arange(n_y)[:, None] - 8) / 8).astype(int) * n_x + x[None, :]
    ratio = r / resp
    for g in np.unique(group[lit]):
        sel = lit & (group == g)
        assert np.ptp(ratio[sel]) / ratio[sel].mean() < 1e-2
    # 2% PRNU averaged over ~3 effective px: ~1.2% scatter, 4 sigma bound
    np.testing.assert_allclose(lamp, amps, rtol=0.05)
    assert np.all(r[~lit & (img < 1e-3 * img.max())] == 1.0)


def test_profiles_on_trace_windows_equal_every_row(rng):
    # Each column is evaluated near its trace only; elsewhere the pixel-integrated
    # Gaussian 0.5 (erf(u+) - erf(u-)) is exactly 0 in float64, so the profiles must be
    # bit-identical to the formula on every row: traces at and beyond the edges, widths
    # 0.6-1.6 px, one centre far off the detector.
    from scipy.special import erf
    n_t, n_x, n_y = 24, 64, 200
    centres = np.linspace(-3, n_y + 3, n_t)[:, None] + rng.normal(0, 2, (n_t, n_x))
    sigmas = rng.uniform(0.6, 1.6, (n_t, n_x))
    centres[3, 5] = 1e12
    y = np.arange(n_y, dtype=float)[None, :, None]
    c, s = centres[:, None, :], sigmas[:, None, :]
    every_row = 0.5 * (erf((y + 0.5 - c) / s / np.sqrt(2)) - erf((y - 0.5 - c) / s / np.sqrt(2)))
    assert np.array_equal(trace_profiles(centres, sigmas, n_y=n_y), every_row)
    # a NaN centre takes the every-row path: NaN in its column only
    centres[0, 0] = np.nan
    prof = trace_profiles(centres, sigmas, n_y=n_y)
    assert np.isnan(prof[0, :, 0]).all() and np.isfinite(prof[1:]).all()


def test_fit_amplitudes_separates_overlapping_traces(rng):
    n_y, n_x = 40, 8
    centres = np.array([[16.0] * n_x, [20.0] * n_x])   # 4 px apart, sigma 1: split layout
    sigmas = np.ones((2, n_x))
    amps = np.array([[1000.0] * n_x, [3000.0] * n_x])
    img, _ = _draw_flat(rng, n_y=n_y, n_x=n_x, centres=centres, sigmas=sigmas, amps=amps)
    a, model = fit_amplitudes(img, centres, sigmas)
    np.testing.assert_allclose(a, amps, rtol=1e-4)   # noiseless: exact up to the model error
    np.testing.assert_allclose(model, img, atol=0.05)


def test_nan_policy_and_mask():
    img = np.ones((20, 5))
    img[3, 2] = np.nan
    with pytest.raises(ValueError, match="non-finite"):
        pixel_response(img, np.full((1, 5), 10.0), np.ones((1, 5)))
    ok = combine_valid(np.ones((2, 2), bool), np.array([[1.0, 0.2], [np.nan, 1.1]]),
                       flat_saturated=np.array([[False, False], [False, True]]))
    assert ok.tolist() == [[True, False], [False, False]]


def test_response_with_smooth_spectrum_recovers_prnu(rng):
    """With the lamp spectrum smooth along x, the response carries the column means
    too: it must equal the true pixel response itself."""
    n_y, n_x, n_t = 60, 48, 6
    x = np.arange(n_x)
    centres = (8 + 8 * np.arange(n_t))[:, None] + 0.01 * (x - 24)[None, :]
    sigmas = np.full((n_t, n_x), 1.0)
    amps = 4e5 * (1 + 0.2 * ((x - 24) / 24) - 0.1 * ((x - 24) / 24) ** 2)[None, :] \
        * np.ones((n_t, 1))
    img, resp = _draw_flat(rng, n_y=n_y, n_x=n_x, centres=centres, sigmas=sigmas, amps=amps,
                           prnu=0.02)
    r, lamp = pixel_response(img * resp, centres, sigmas, smooth_deg=3)
    core = img > 0.2 * img.max(axis=0)
    # Noiseless, smooth spectrum: the per-column factor (1.2% rms without smoothing, 2%
    # PRNU over ~3 effective pixels) is gone; what remains is the cubic fit's error
    # through 48 such factors, ~1.2% x sqrt(4 / 48) = 0.35% rms, worse at the ends.
    dev = r[core] / resp[core] - 1
    assert np.sqrt(np.mean(dev ** 2)) < 0.005 and np.max(np.abs(dev)) < 0.02
    np.testing.assert_allclose(lamp, amps, rtol=0.02)


@pytest.mark.parametrize("spacing", [8.0, 4.0])   # joint and split polarisation layouts
def test_lamp_amplitude_is_window_flux_despite_a_wrong_width(rng, spacing):
    """A profile 3% too wide biases a least-squares amplitude by about +1.5% (for
    Gaussians, int(P_m P_t) / int(P_m^2) = sqrt(2 s_m^2 / (s_m^2 + s_t^2)), standard
    integral); the lamp amplitude of pixel_response is the flux collected in the
    trace's window instead, so the trace's throughput is not biased by the width."""
    n_y, n_x, n_t = 70, 32, 6
    centres = (10 + spacing * np.arange(n_t))[:, None] + np.zeros((1, n_x))
    sigmas = np.full((n_t, n_x), 1.0)
    amps = 3e5 * rng.uniform(0.7, 1.3, (n_t, 1)) * np.ones((1, n_x))
    img, _ = _draw_flat(rng, n_y=n_y, n_x=n_x, centres=centres, sigmas=sigmas, amps=amps)
    from pipeline.numerics.traces import fit_amplitudes
    wide = 1.03 * sigmas
    biased, _ = fit_amplitudes(img, centres, wide)
    # (with the fitted constant background of fit_amplitudes the bias is larger still)
    assert spacing == 4.0 or np.all(biased / amps - 1 > np.sqrt(2 * 1.03 ** 2 / (1.03 ** 2 + 1)) - 1 - 1e-3)
    _, lamp = pixel_response(img, centres, wide)
    if spacing == 8.0:   # isolated: the +-3 sigma window keeps 99.7% of the flux
        np.testing.assert_allclose(lamp / amps, 1.0, atol=0.001)
    else:                # overlapping (split polarisation): the least-squares amplitude
        np.testing.assert_allclose(lamp, biased, rtol=1e-12)


def test_detector_response_from_a_detector_flat(rng):
    """A detector lit smoothly (quadratic illumination) times a 2% pixel response, with
    photon noise and a few hot pixels: the response comes back to the photon noise
    (1 / sqrt(N) per pixel, Poisson statistics), the hot pixels do not bend the fit."""
    from pipeline.numerics.traces import detector_response
    n_y, n_x = 80, 120
    yy, xx = np.meshgrid(np.linspace(-1, 1, n_y), np.linspace(-1, 1, n_x), indexing="ij")
    illum = 4e5 * (1 + 0.05 * yy - 0.03 * xx + 0.02 * xx * yy - 0.01 * yy ** 2)
    resp = 1 + 0.02 * rng.standard_normal((n_y, n_x))
    img = rng.poisson(illum * resp).astype(float)
    hot = rng.choice(n_y * n_x, 40, replace=False)
    img.reshape(-1)[hot] += 5e5
    est, fitted = detector_response(img)
    good = np.ones(img.shape, bool)
    good.reshape(-1)[hot] = False
    np.testing.assert_allclose(fitted, illum * resp.mean(), rtol=2e-3)
    rel = est[good] / resp[good] * resp.mean() - 1
    assert np.std(rel) < 1.3 / np.sqrt(4e5)                  # photon noise ~0.16%
    valid = np.ones(img.shape, bool)
    valid[5, 7] = False
    assert np.isnan(detector_response(img, valid=valid)[0][5, 7])
