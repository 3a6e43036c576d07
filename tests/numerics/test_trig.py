# SPDX-License-Identifier: BSD-3-Clause
"""The float32-evaluated cosine, sine and sinc against numpy's float64 functions (the
reference: correctly rounded to ~1 ulp of float64)."""

import numpy as np

from pipeline.numerics.trig import cis, cos_sin, sinc


def test_cos_sin_within_3e7_over_many_turns(rng):
    # phases from 1e-6 rad to 1e6 rad (a fringe model's phase spans thousands of turns),
    # both signs, and the awkward points: 0, multiples of pi/2, near +-pi
    mag = 10.0 ** rng.uniform(-6, 6, 200_000)
    phase = np.concatenate([mag * rng.choice([-1, 1], mag.size),
                            np.arange(-40, 41) * np.pi / 2, [np.pi - 1e-9, -np.pi + 1e-9]])
    c, s = cos_sin(phase)
    assert c.dtype == s.dtype == np.float64 and c.shape == phase.shape
    assert np.max(np.abs(c - np.cos(phase))) < 3e-7
    assert np.max(np.abs(s - np.sin(phase))) < 3e-7
    grid = phase[:2000].reshape(2, 1000)
    z = cis(grid)
    assert z.dtype == np.complex128 and z.shape == grid.shape
    assert np.max(np.abs(z - np.exp(1j * grid))) < 5e-7


def test_sinc_matches_numpy(rng):
    x = np.concatenate([[0.0, 1.0, -2.0, 0.5, 1e-12], rng.uniform(-30, 30, 10_000)])
    got = sinc(x)
    np.testing.assert_allclose(got, np.sinc(x), rtol=0, atol=3e-7)
    assert got[0] == 1.0 and got.dtype == np.float64


def test_sinc_small_and_subnormal_arguments(rng):
    # float32 underflows below ~1e-38 (1e-45 rounds to zero): the sine of the cast
    # argument would give 0 or a few-percent error there instead of 1
    x = np.array([1e-300, -1e-40, 1e-20, 1e-8, 3e-4, -3.2e-4, 0.3183])
    np.testing.assert_allclose(sinc(x), np.sinc(x), rtol=0, atol=3e-7)
    # and the same bound within one half turn, where the smearing arguments lie
    small = rng.uniform(-0.99, 0.99, 10_000)
    np.testing.assert_allclose(sinc(small), np.sinc(small), rtol=0, atol=3e-7)


def test_wrap_phase_into_minus_pi_pi(rng):
    # the argument of exp(i phi) (numpy float64 reference), in (-pi, pi]; +-pi -> pi
    from pipeline.numerics.trig import wrap_phase
    phi = np.concatenate([rng.uniform(-1e4, 1e4, 100_000), [np.pi, -np.pi, 3 * np.pi, 0.0]])
    got = wrap_phase(phi)
    assert np.all((got > -np.pi) & (got <= np.pi))
    d = np.angle(np.exp(1j * (got - phi)))          # same angle: a multiple of 2 pi apart
    assert np.max(np.abs(d)) < 1e-11
    assert got[-4] == np.pi and got[-3] == np.pi and abs(got[-2] - np.pi) < 1e-12
    assert np.isnan(wrap_phase(np.array([np.nan, np.inf]))).all()
