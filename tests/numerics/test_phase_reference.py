# SPDX-License-Identifier: BSD-3-Clause
"""Phase referencing kernels against a forward model written here.

The forward model follows the phase model of DEVELOPERS.md: per telescope a
closed-loop residual path r_i(t) sampled at 1 kHz, FT coherent fluxes
A exp(-2 pi i sigma (r_j - r_i)) per FT pixel plus Gaussian noise, science
frames integrating exp(-2 pi i (r_j - r_i + d_ij) / lambda) over their DIT.
"""

import numpy as np
import pytest

from pipeline.numerics.phase_reference import (
    FLAG_CLOSURE, FLAG_FRINGE_JUMP, FLAG_GD_EXCURSION, FLAG_LOW_SNR, chebyshev_interpolator,
    dual_field_delay, flag_ft_frames, frame_windows, fringe_estimates, mean_phasor,
    reference_coherent, track_opd, window_fraction, window_mean)

BASELINES = [(0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3)]
TRIANGLES = [(0, 1, 2), (0, 1, 3), (0, 2, 3), (1, 2, 3)]
FT_WAVE = np.linspace(1.99e-6, 2.41e-6, 6)
PERIOD = 1e-3
AMP, VAR = 30.0, 10.0     # per FT pixel: coherent amplitude and variance of each real part


def residual_paths(rng, n, rms=200e-9, tau=20.0):
    """AR(1) residual path per telescope, shape (n, 4), m; correlation time tau frames."""
    a = np.exp(-1 / tau)
    x = np.zeros((n, 4))
    e = rng.standard_normal((n, 4)) * np.sqrt(1 - a * a)
    x[0] = rng.standard_normal(4)
    for t in range(1, n):                      # test-side forward model only
        x[t] = a * x[t - 1] + e[t]
    return rms * x


def baseline_opd(r):
    i, j = np.array(BASELINES).T
    return r[:, j] - r[:, i]


def ft_stream(rng, opd, amp):
    """FT coherent fluxes (n, 6, n_ftw) for paths opd (n, 6) and amplitudes amp (n, 6)."""
    sigma = 1 / FT_WAVE
    c = amp[..., None] * np.exp(-2j * np.pi * sigma * opd[..., None])
    noise = np.sqrt(VAR) * (rng.standard_normal(c.shape) + 1j * rng.standard_normal(c.shape))
    return c + noise, np.full(c.shape, VAR)


@pytest.fixture
def scene(rng):
    n = 4000
    r = residual_paths(rng, n)
    wave_ref = 1 / np.mean(1 / FT_WAVE)
    r[2500:2800, 2] += wave_ref                # fringe jump of telescope 2 (one FT fringe)
    opd = baseline_opd(r)
    amp = np.full(opd.shape, AMP)
    amp[1000:1100] = 0.0                       # lock loss: fringes gone on every baseline
    c, v = ft_stream(rng, opd, amp)
    return dict(n=n, opd=opd, c=c, v=v, wave_ref=wave_ref)


def test_group_delay_phase_snr(scene):
    est = fringe_estimates(scene["c"], FT_WAVE, ft_coherent_var=scene["v"])
    good = np.ones(scene["n"], bool)
    good[1000:1100] = False
    sigma = 1 / FT_WAVE
    # least-squares slope error of a phase ramp: sigma_phi / sqrt(sum (s - s_mean)^2),
    # sigma_phi = sqrt(VAR) / AMP per pixel (small-noise phase error), / (2 pi) for a delay
    gd_sigma = np.sqrt(VAR) / AMP / (2 * np.pi * np.sqrt(np.sum((sigma - sigma.mean()) ** 2)))
    err = est.group_delay[good] - scene["opd"][good]
    assert np.sqrt(np.mean(err ** 2)) < 1.3 * gd_sigma      # 30 %: estimator not exactly LS
    # phase at sigma_0 = 1 / wave_ref: -2 pi sigma_0 opd, noise sqrt(VAR / (n AMP^2))
    assert est.wave_ref == pytest.approx(scene["wave_ref"])
    dphi = np.angle(np.exp(1j * (est.phase + 2 * np.pi * scene["opd"] / est.wave_ref)))[good]
    snr_expected = 6 * AMP / np.sqrt(6 * VAR)
    assert np.sqrt(np.mean(dphi ** 2)) < 1.3 / snr_expected
    # SNR: |S| / noise, expected n AMP / sqrt(n VAR) while locked, ~1.3 (Rayleigh mean) when not
    assert np.median(est.snr[good]) == pytest.approx(snr_expected, rel=0.05)
    assert np.median(est.snr[1000:1100]) < 3


def test_nan_pixel_is_ignored(scene):
    c = scene["c"].copy()
    c[:, :, 2] = np.nan                            # one FT pixel unusable in every frame
    est = fringe_estimates(c, FT_WAVE, ft_coherent_var=scene["v"])
    good = np.ones(scene["n"], bool)
    good[1000:1100] = False
    assert np.isfinite(est.group_delay).all() and np.isfinite(est.snr).all()
    # five pixels left: the SNR scales as sqrt(5/6) of the full one (same per-pixel SNR)
    assert np.median(est.snr[good]) == pytest.approx(np.sqrt(5) * AMP / np.sqrt(VAR), rel=0.05)
    dphi = np.angle(np.exp(1j * (est.phase + 2 * np.pi * scene["opd"] / est.wave_ref)))[good]
    assert np.sqrt(np.mean(dphi ** 2)) < 0.1


def test_tracking_and_flags(scene):
    est = fringe_estimates(scene["c"], FT_WAVE, ft_coherent_var=scene["v"])
    opd = track_opd(est.phase, est.group_delay, wave_ref=est.wave_ref, window=25)
    flags = flag_ft_frames(est.snr, est.group_delay, opd, wave_ref=est.wave_ref,
                           baselines=BASELINES, triangles=TRIANGLES, snr_min=4.0, guard=10)
    # every lock-loss frame is flagged on every baseline
    assert (flags[1000:1100] & (FLAG_LOW_SNR | FLAG_GD_EXCURSION)).all()
    # the jump of telescope 2 is flagged on its three baselines and only there
    with2 = [1, 3, 5]
    assert (flags[2500:2800, with2] & FLAG_FRINGE_JUMP).all()
    without2 = [0, 2, 4]
    assert not (flags[2600:2700, without2] & FLAG_FRINGE_JUMP).any()
    # outside the injected events (plus the guard and running-median windows)
    # almost nothing is flagged: SNR ~ 23 makes a dip below 4 very rare
    quiet = np.ones(scene["n"], bool)
    quiet[960:1140] = quiet[2460:2840] = False
    assert (flags[quiet] != 0).mean() < 0.01
    # the tracked path has the right whole number of fringes wherever the frame is good,
    # jump included (path within a quarter fringe of truth)
    good = flags == 0
    assert np.all(np.abs(opd - scene["opd"])[good] < 0.25 * est.wave_ref)
    assert np.all(np.abs(opd - scene["opd"])[2550:2750, with2] < 0.25 * est.wave_ref)


def test_constant_phase_offset_does_not_cause_jumps(scene):
    # an instrumental FT phase of 0.95 pi shifts the phase delay by almost half a fringe
    # from the group delay: the fringe count must not flicker between two values
    est = fringe_estimates(scene["c"] * np.exp(0.95j * np.pi), FT_WAVE,
                           ft_coherent_var=scene["v"])
    opd = track_opd(est.phase, est.group_delay, wave_ref=est.wave_ref)
    flags = flag_ft_frames(est.snr, est.group_delay, opd, wave_ref=est.wave_ref,
                           baselines=BASELINES, triangles=TRIANGLES, snr_min=4.0)
    quiet = np.ones(scene["n"], bool)
    quiet[960:1140] = quiet[2460:2840] = False
    assert ((flags[quiet] & FLAG_FRINGE_JUMP) != 0).mean() < 0.01
    # the tracked path is the true one minus the constant 0.95 pi of phase, whole fringes right
    shift = -0.95 * np.pi * est.wave_ref / (2 * np.pi)
    err = (opd - scene["opd"] - shift)[quiet & (flags == 0).all(1)]
    assert np.abs(err).max() < 0.25 * est.wave_ref


def test_closure_flag(scene):
    # a whole-fringe error on one baseline only breaks the closure of its two triangles
    opd = scene["opd"].copy()
    opd[3000:3200, 0] += scene["wave_ref"]
    snr = np.full(opd.shape, 20.0)
    flags = flag_ft_frames(snr, opd, opd, wave_ref=scene["wave_ref"], baselines=BASELINES,
                           triangles=TRIANGLES, window=25, guard=5)
    assert (flags[3050:3150, 0] & FLAG_CLOSURE).all()
    # baseline (2, 3) is in no triangle with (0, 1)
    assert not (flags[:, 5] & FLAG_CLOSURE).any()


def test_contrast_loss_and_referencing(scene, rng):
    est = fringe_estimates(scene["c"], FT_WAVE, ft_coherent_var=scene["v"])
    opd_est = track_opd(est.phase, est.group_delay, wave_ref=est.wave_ref)
    n_frame, dit = 30, 0.1                     # 100 ms science frames over the first 3 s
    start = np.arange(n_frame) * dit
    ft_mid = (np.arange(scene["n"]) + 0.5) * PERIOD
    lo, hi = frame_windows(ft_mid, start, np.full(n_frame, dit))
    assert np.all(hi - lo == 100)
    wave = np.linspace(2.0e-6, 2.4e-6, 9)
    m = mean_phasor(opd_est, lo, hi, wave)
    # summing in blocks of FT frames (bounded memory) is exact up to rounding
    np.testing.assert_allclose(mean_phasor(opd_est, lo, hi, wave, block=7), m, rtol=1e-12)
    # direct: |mean over the frame of exp(-2 pi i opd_true / lambda)|, one frame at a time
    direct = np.empty((n_frame, 6, wave.size), complex)
    for f in range(n_frame):
        seg = scene["opd"][f * 100:(f + 1) * 100]
        for b in range(6):
            for w, lam in enumerate(wave):
                direct[f, b, w] = np.mean(np.exp(-2j * np.pi * seg[:, b] / lam))
    ok = np.ones(n_frame, bool)
    ok[10:11] = False                          # frame 10 holds the lock loss (1.0-1.1 s)
    # estimated path noise ~ lambda_ft / (2 pi SNR) ~ 15 nm -> contrast error < 1e-3;
    # 0.01 leaves room for the few frames near the lock loss edges
    np.testing.assert_allclose(np.abs(m[ok]), np.abs(direct[ok]), atol=0.01)
    assert np.abs(direct).min() < 0.97        # the test exercises a real contrast loss

    # science frames: sky visibility, dual-field delay d, common residual path
    vis = 0.7 * np.exp(1j * rng.uniform(-np.pi, np.pi, (6, wave.size)))
    c_tel = np.array([0.0, 0.3e-6, -0.5e-6, 1.1e-6])          # metrology constants
    i, j = np.array(BASELINES).T
    delay = rng.uniform(-3e-6, 3e-6, (n_frame, 6))            # D_ij reported
    d = delay - (c_tel[j] - c_tel[i])                          # true differential path
    sci = vis * direct * np.exp(-2j * np.pi * d[..., None] / wave)
    sci = np.stack([sci, sci], axis=1) * 5.0                   # two polarisations
    ref = reference_coherent(sci, m, delay, wave)
    expected = np.angle(vis) + 2 * np.pi * (c_tel[j] - c_tel[i])[:, None] / wave
    dphi = np.angle(ref[ok] * np.exp(-1j * expected))
    # path noise ~ 15 nm -> ~0.05 rad at 2 um; 0.1 rad covers the worst frame
    assert np.abs(dphi).max() < 0.1
    np.testing.assert_allclose(np.abs(ref), np.abs(sci), rtol=1e-12)   # amplitude untouched


def test_flux_weighted_phasor(rng):
    # a science frame integrates sqrt(F_i F_j) exp(i phi) and its photometry <F_i>, so the
    # coherence it keeps is |<sqrt(F_i F_j) exp(i phi)>| / sqrt(<F_i><F_j>) (computed
    # directly below); by Cauchy-Schwarz it is at most the pure-phase |<exp(i phi)>|
    n, wave = 300, np.array([2.0e-6, 2.3e-6])
    opd = residual_paths(rng, n)[:, :2] @ np.array([[-1.0], [1.0]])      # baseline (0, 1)
    flux = np.exp(0.4 * rng.standard_normal((n, 2)))                       # lognormal coupling
    lo, hi = np.array([0, 100]), np.array([100, 300])
    got = mean_phasor(opd, lo, hi, wave, flux=flux, baselines=[(0, 1)])
    for f, (a, b) in enumerate(zip(lo, hi)):
        for w, lam in enumerate(wave):
            amp = np.sqrt(flux[a:b, 0] * flux[a:b, 1])
            num = np.mean(amp * np.exp(-2j * np.pi * opd[a:b, 0] / lam))
            direct = num / np.sqrt(flux[a:b, 0].mean() * flux[a:b, 1].mean())
            # 5e-7: mean_phasor's cosines and sines are float32-evaluated (3e-7 each,
            # pipeline/numerics/trig.py); the direct sum here is float64
            assert abs(got[f, 0, w] - direct) < 5e-7
    plain = mean_phasor(opd, lo, hi, wave)
    assert np.all(np.abs(got) <= np.abs(plain) + 1e-6)
    # constant fluxes: the weighting changes nothing
    same = mean_phasor(opd, lo, hi, wave, flux=np.full((n, 2), 3.0), baselines=[(0, 1)])
    np.testing.assert_allclose(same, plain, rtol=1e-12)


def test_mean_phasor_many_wavelengths_against_direct_sum(rng):
    # With many science wavelengths the sum over FT frames is evaluated at Chebyshev
    # nodes of the wavenumber band and interpolated; it must equal the direct float64
    # sum over every wavelength, also for frames whose paths spread over several
    # fringes (a fringe jump, a lock loss drifting by ~20 um). To 5e-7: the cosines and
    # sines are float32-evaluated (pipeline/numerics/trig.py, 3e-7 each); the
    # interpolation itself is exact to ~1e-13 (next test)
    n, wave = 900, np.linspace(1.95e-6, 2.45e-6, 240)
    opd = residual_paths(rng, n)[:, :2] @ np.array([[-1.0, 0.5], [1.0, 0.5]])
    opd[400:500, 0] += 2.2e-6                                     # a fringe jump
    opd[600:900, 1] += np.linspace(0, 20e-6, 300)                 # a long excursion
    flux = np.exp(0.3 * rng.standard_normal((n, 3)))
    lo, hi = np.array([0, 300, 600, 50]), np.array([300, 600, 900, 50])
    got = mean_phasor(opd, lo, hi, wave, flux=flux, baselines=[(0, 1), (1, 2)])
    k = -2 * np.pi / wave
    for f, (a, e) in enumerate(zip(lo, hi)):
        if e == a:                                                # no FT frame: NaN
            assert np.isnan(got[f]).all()
            continue
        for bi, (i, j) in enumerate([(0, 1), (1, 2)]):
            amp = np.sqrt(flux[a:e, i] * flux[a:e, j])
            direct = (amp[:, None] * np.exp(1j * opd[a:e, bi, None] * k)).mean(0)
            direct /= np.sqrt(flux[a:e, i].mean() * flux[a:e, j].mean())
            np.testing.assert_allclose(got[f, bi], direct, rtol=0, atol=5e-7)


def test_chebyshev_interpolator_reproduces_polynomials():
    # barycentric interpolation at n Chebyshev points is exact for degree < n
    # (Berrut & Trefethen 2004, SIAM Review 46, 501)
    x = np.linspace(-1, 1, 57)
    nodes, m = chebyshev_interpolator(x, 8)
    assert np.all(np.abs(nodes) < 1)
    poly = np.polynomial.Polynomial([0.3, -1.0, 2.0, 0.5, -0.7, 0.1, 1.3, -0.4])
    np.testing.assert_allclose(m @ poly(nodes), poly(x), atol=1e-13)
    nodes, m = chebyshev_interpolator(nodes[:3], 8)               # at a node: that value
    np.testing.assert_array_equal(m, np.eye(8)[:3])


def test_dual_field_delay_against_spherical_trigonometry():
    # s in local East/North/Up from hour angle H and declination (standard
    # spherical astronomy: e.g. Smart, Textbook on Spherical Astronomy, ch. 2)
    lat = np.deg2rad(-37.41)
    p = np.array([[0, 0, 0], [46.2, 21.0, 0.3], [20.0, -60.0, -0.2], [-58.0, 40.0, 0.5]])

    def s_enu(h, dec):
        return np.stack([-np.cos(dec) * np.sin(h),
                         np.cos(lat) * np.sin(dec) - np.sin(lat) * np.cos(dec) * np.cos(h),
                         np.sin(lat) * np.sin(dec) + np.cos(lat) * np.cos(dec) * np.cos(h)], -1)

    h_sc = np.linspace(-1.0, 1.2, 7)
    h_ft = h_sc + 1.3e-5
    dec_sc, dec_ft = np.deg2rad(-30.0), np.deg2rad(-30.0) + 2e-5
    path = np.tile([0.0, 1e-4, -2e-4, 3e-4], (7, 1))
    got = dual_field_delay(h_sc, h_ft, path, dec_sc_rad=dec_sc, dec_ft_rad=dec_ft,
                           station_enu_m=p, latitude_rad=lat, baselines=BASELINES)
    w = (s_enu(h_sc, dec_sc) @ p.T) - (s_enu(h_ft, dec_ft) @ p.T) + path
    i, j = np.array(BASELINES).T
    np.testing.assert_allclose(got, w[:, j] - w[:, i], atol=1e-12)   # float64 rounding on 100 m
    assert np.abs(got).max() > 1e-3        # mm-scale dual-field term is actually exercised


def test_windows():
    t = np.arange(10) + 0.5
    lo, hi = frame_windows(t, [0.0, 3.0, 20.0], [3.0, 2.0, 1.0])
    assert list(lo) == [0, 3, 10] and list(hi) == [3, 5, 10]
    frac = window_fraction(np.arange(10)[:, None] % 2 == 0, lo, hi)
    np.testing.assert_allclose(frac[:, 0], [2 / 3, 0.5, 1.0])   # empty window -> 1
    vals = np.stack([t, 2 * t], -1)
    mean = window_mean(vals, t, [0.0, 3.0, 20.0], [3.0, 2.0, 1.0])
    np.testing.assert_allclose(mean[:2], [[1.5, 3.0], [4.0, 8.0]])
    np.testing.assert_allclose(mean[2], [9.5, 19.0])            # no sample: interpolation (clamped)


def test_running_median_equals_the_nd_median_filter(rng):
    # column by column it must equal scipy's N-D median filter with a (window, 1) footprint
    from scipy.ndimage import median_filter

    from pipeline.numerics.phase_reference import _running_median
    x = np.cumsum(rng.normal(size=(5000, 6)), axis=0)
    for window in (1, 24, 25):
        np.testing.assert_array_equal(_running_median(x, window),
                                      median_filter(x, size=(window, 1), mode="nearest"))
