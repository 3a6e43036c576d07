# SPDX-License-Identifier: BSD-3-Clause
"""Wavelength calibration from delay scans against an independent forward model.

The scan signal is computed here by brute force: a Gaussian channel spectrum
sampled on 161 wavenumbers, each contributing 1 + V cos(2 pi sigma o - theta), summed
(the polychromatic interferogram, e.g. Born & Wolf, Principles of Optics,
section 7.5.8) - not the kernel's analytic envelope. Photon and read noise added.
"""

import numpy as np
import pytest

from pipeline.numerics.wavelength import (common_grid, fit_dispersion_law, fit_fringe_scan,
                                          fringe_phasor, gaussian_envelope)
from pipeline.skymodel import smearing_envelope


def _interferogram(opd, wave, fwhm, theta, flux, vis):
    """opd (sample,), wave/fwhm/theta/flux/vis (pix,) -> (sample, pix), numerically."""
    sig0 = 1 / wave
    dsig = fwhm / wave ** 2
    t = np.linspace(-4, 4, 161)[:, None]               # in units of the Gaussian's sigma
    sig = sig0 + t * dsig / 2.3548
    spec = np.exp(-0.5 * t ** 2)
    spec = spec / spec.sum(0)
    ph = 2 * np.pi * sig[None] * opd[:, None, None] - theta
    return flux * (1 + vis * np.sum(spec[None] * np.cos(ph), axis=1))


def test_gaussian_envelope_matches_skymodel():
    o = np.linspace(-1e-3, 1e-3, 7)
    np.testing.assert_allclose(gaussian_envelope(o, 2.2e-6, 4e-9),
                               smearing_envelope(o, 2.2e-6, 4e-9), rtol=1e-14)


@pytest.mark.parametrize("resolution, step_waves", [(500, 0.35), (500, 1.3), (22, 0.2),
                                                     (22, 1.3)])
def test_scan_recovers_wavelength_bandwidth_phase(rng, resolution, step_waves):
    """step_waves 1.3: OPD step of 1.2-1.4 wavelengths per sample (undersampled fringes)."""
    n_pix = 12
    wave = np.linspace(2.0e-6, 2.4e-6, n_pix) * (1 + rng.normal(0, 2e-3, n_pix))
    fwhm = wave / resolution * rng.uniform(0.9, 1.1, n_pix)
    theta = rng.uniform(-np.pi, np.pi, n_pix)
    half = 3 * 2.2e-6 * resolution           # +-3 coherence lengths lambda^2 / fwhm
    step = step_waves * 2.2e-6
    n_s = int(2 * half / step)
    opd = (np.arange(n_s) - n_s / 2) * step + rng.normal(0, 2e-9, n_s)   # 2 nm metrology noise
    truth = _interferogram(opd, wave, fwhm, theta, flux=2e4, vis=0.9)
    data = rng.poisson(truth) + rng.normal(0, 10, truth.shape)
    guess = np.linspace(2.0e-6, 2.4e-6, n_pix)          # nominal law, off by ~2e-3
    fit = fit_fringe_scan(data, opd[:, None], guess)
    # Photon-limited: the fit's own errors are ~3e-7 (R 500) and ~3.5e-5 (R 22), and
    # their pulls have unit width (checked by hand over 5 seeds). Bounds at ~5 sigma
    # over 12 pixels: 3e-6 and 2e-4.
    tol = 3e-6 if resolution == 500 else 2e-4
    assert np.max(np.abs(fit.wave / wave - 1)) < tol
    # Bandwidth from the envelope over ~20 blocks: 3% (the project's goal is 5%).
    assert np.max(np.abs(fit.bandwidth / fwhm - 1)) < 0.03
    assert np.all(fit.bandwidth_err / fwhm < 0.03)
    np.testing.assert_allclose(fit.opd_centre, 0, atol=0.02 * wave[0] * resolution)
    # phase at zero OPD: error ~1/SNR rad; 1 deg bound
    dphi = np.angle(np.exp(1j * (fit.phase - theta)))
    assert np.max(np.abs(np.rad2deg(dphi))) < 1.0
    # the known-wavelength phasor fit agrees: |Z| = flux * vis, arg Z = theta
    z, zvar, dc = fringe_phasor(data, opd[:, None], fit.wave, fit.bandwidth)
    np.testing.assert_allclose(np.abs(z), 2e4 * 0.9, rtol=0.01)   # SNR > 100 per pixel
    assert np.max(np.abs(np.rad2deg(np.angle(z * np.exp(-1j * theta))))) < 1.0
    np.testing.assert_allclose(dc, 2e4, rtol=0.005)


def test_each_pixel_fitted_on_its_own(rng):
    """Every pixel is its own fit: the result of a pixel does not depend on the pixels
    fitted beside it (each stops iterating when it converges, not when the slowest pixel
    of its batch does). A noisy, a clean and a faint pixel, together and one by one, also
    under an OPD window."""
    wave = np.array([2.05e-6, 2.2e-6, 2.35e-6])
    n_s = 600
    opd = (np.arange(n_s) - n_s / 2) * 0.35 * 2.2e-6
    truth = _interferogram(opd, wave, wave / 500, np.array([0.3, -1.0, 2.0]), 2e4,
                           np.array([0.9, 0.9, 0.05]))
    data = rng.poisson(truth) + rng.normal(0, 10, truth.shape)
    data[:, 1] = truth[:, 1]
    guess = wave * (1 + np.array([1e-3, -1e-3, 5e-4]))
    for window in (None, np.array([2e-4, 3e-4, 4e-4])):
        together = fit_fringe_scan(data, opd[:, None], guess, max_opd=window)
        for k in range(3):
            alone = fit_fringe_scan(data[:, k:k + 1], opd[:, None], guess[k:k + 1],
                                    max_opd=None if window is None else window[k:k + 1])
            for name in ("wave", "wave_err", "bandwidth", "bandwidth_err", "opd_centre",
                         "amplitude", "phase", "snr"):
                np.testing.assert_allclose(getattr(alone, name)[0],
                                           getattr(together, name)[k], rtol=1e-9,
                                           err_msg=f"pixel {k} {name}")


def test_exposure_smearing_corrected(rng):
    """Samples integrating over a moving OPD: amplitude x sinc(span / lambda) (boxcar
    average of a cosine), which the fits undo."""
    wave = np.array([2.1e-6, 2.3e-6])
    step = 0.4e-6
    centres = (np.arange(800) - 400) * step
    sub = (np.arange(20) + 0.5) / 20 - 0.5                   # exposure sampled in time
    opd_sub = centres[:, None] + sub[None, :] * step
    truth = np.stack([_interferogram(opd_sub[:, k], wave, wave / 22, np.zeros(2), 1e4, 1.0)
                      for k in range(20)]).mean(0)
    fit = fit_fringe_scan(truth, centres[:, None], wave, opd_span=step)
    np.testing.assert_allclose(fit.amplitude, 1e4, rtol=0.01)
    z, _, _ = fringe_phasor(truth, centres[:, None], fit.wave, fit.bandwidth, opd_span=step)
    np.testing.assert_allclose(np.abs(z), 1e4, rtol=0.003)


def test_dispersion_law_rejects_outliers(rng):
    x = np.arange(64)
    law_true = 2.1e-6 + 3e-9 * (x - 32) + 2e-12 * (x - 32) ** 2
    meas = np.stack([law_true, law_true + 1e-9]) + rng.normal(0, 1e-11, (2, 64))
    meas[0, 10] += 5e-9                 # outlier
    meas[1, 20] = np.nan                # no measurement
    law, coeffs, used, _, _ = fit_dispersion_law(meas, np.full((2, 64), 1e-11), deg=2)
    # 64 points with 1e-11 noise: the law is good to ~3e-12 (a few sigma/sqrt(64) x 3)
    np.testing.assert_allclose(law, np.stack([law_true, law_true + 1e-9]), atol=1e-11)
    assert not used[0, 10] and not used[1, 20] and used.sum() == 126
    grid = common_grid(law, extrapolate_px=0.5)
    # median of 2 traces = their mean; the trace offset by 1e-9 m (~0.3 px) is covered
    # with half a pixel of extrapolation, so no column is trimmed
    np.testing.assert_allclose(grid, law_true + 0.5e-9, atol=1e-11)
    assert common_grid(law, extrapolate_px=0.0).size == 62   # one column lost at each end


def test_baseline_bandwidth_adds_the_resampling_spread():
    """Grid points half way between pixels d apart: a linear interpolation (weights 1/2,
    1/2) has variance d^2 / 4, so FWHM^2 = b^2 + 8 ln2 d^2 / 4 (Gaussian FWHM = 2 sqrt(2 ln 2)
    sigma, standard); on a pixel the line-spread alone. Traces of one baseline and
    polarisation combine as the root mean square."""
    from pipeline.numerics.wavelength import baseline_bandwidth
    d = 20e-9
    wp = 2.0e-6 + d * np.arange(24)[None, :] + np.array([[0.0], [0.0], [0.5 * d], [0.5 * d]])
    bp = np.array([[80e-9], [100e-9], [90e-9], [90e-9]]) * np.ones((1, 24))
    grid = wp[0, 2:-2]
    out = baseline_bandwidth(wp, bp, grid, trace_baseline=[0, 0, 1, 1], trace_pol=[0, 0, 0, 0],
                             n_baseline=3, n_pol=1)
    assert out.shape == (1, 3, grid.size)
    np.testing.assert_allclose(out[0, 0], np.sqrt((80e-9 ** 2 + 100e-9 ** 2) / 2), rtol=1e-12)
    np.testing.assert_allclose(out[0, 1], np.sqrt(90e-9 ** 2 + 8 * np.log(2) * d ** 2 / 4),
                               rtol=1e-9)
    assert np.isnan(out[0, 2]).all()
