# SPDX-License-Identifier: BSD-3-Clause
"""Master dark, noise map and bad-pixel masks against a seeded forward model.

The forward model (written here, independent of the kernel): per-pixel bias
pattern + Poisson dark signal + Gaussian read noise, hot pixels with a large
dark rate, dead pixels stuck at 0, and cosmic-ray hits on a few samples.
"""

import numpy as np
import pytest

from pipeline.numerics.darks import master_dark, robust_centre

N_FRAME, SHAPE, DIT = 40, (32, 48), 2.0
RATE, READ_NOISE, HOT_RATE = 0.5, 6.0, 300.0          # ADU/s, ADU, ADU/s


@pytest.fixture
def stack(rng):
    bias = 1000.0 + rng.normal(0.0, 5.0, SHAPE)         # fixed pattern, ADU
    rate = np.full(SHAPE, RATE)
    hot = [(3, 4), (10, 40), (30, 1)]
    dead = [(5, 5), (20, 30)]
    for p in hot:
        rate[p] = HOT_RATE
    frames = bias + rng.poisson(rate * DIT, (N_FRAME, *SHAPE))
    frames = frames + rng.normal(0.0, READ_NOISE, frames.shape)
    cosmic = (rng.integers(0, N_FRAME, 30), rng.integers(0, SHAPE[0], 30),
              rng.integers(0, SHAPE[1], 30))
    frames[cosmic] += 5000.0
    frames = np.rint(frames)
    for p in dead:
        frames[(slice(None), *p)] = 0.0
    truth = bias + rate * DIT
    return frames, truth, hot, dead, cosmic


def _source(frames, size):
    return lambda: (frames[i:i + size] for i in range(0, len(frames), size))


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_master_dark_recovers_forward_model(stack, dtype):
    frames, truth, hot, dead, cosmic = stack
    res = master_dark(_source(frames.astype(dtype), 8), dit=DIT, kappa=5.0, hot_rate=50.0,
                      low_level=100.0, noisy_factor=5.0, quiet_factor=0.2)
    assert res.master.dtype == np.float64 and res.master.shape == SHAPE
    assert res.n_frame == N_FRAME
    good = res.valid
    err = (res.master - truth)[good]
    # Standard error of a mean of N frames: sqrt(read_noise^2 + dark)/sqrt(N) (+ rounding
    # variance 1/12); the spread of the errors must match it within 10 % (the sample of
    # ~1500 pixels gives ~2 % on a standard deviation) and the mean error be 0 within 5
    # standard errors of the mean.
    sem = np.sqrt(READ_NOISE**2 + RATE * DIT + 1 / 12) / np.sqrt(N_FRAME)
    assert abs(err.std() / sem - 1) < 0.10
    assert abs(err.mean()) < 5 * sem / np.sqrt(err.size)
    # Cosmic rays (+5000 ADU) are clipped: no good pixel is off by more than 6 standard errors.
    assert np.abs(err).max() < 6 * sem
    assert res.n_clipped >= len(set(zip(*cosmic)))
    # Temporal noise per frame (photon-transfer method, Janesick 2001): the median over
    # pixels of the per-pixel estimate (20 pairs each) is within 3 % of the truth.
    expected_noise = np.sqrt(READ_NOISE**2 + RATE * DIT + 1 / 12)
    assert abs(np.median(res.read_noise[good]) / expected_noise - 1) < 0.03
    # Pixel classes are exactly the injected ones.
    assert set(zip(*np.nonzero(res.hot))) == set(hot)
    assert set(zip(*np.nonzero(res.dead))) == set(dead)
    assert not res.noisy.any()
    assert res.valid.sum() == np.prod(SHAPE) - len(hot) - len(dead)
    # Hot pixel dark rates: the forward model's excess over the typical level, within 5
    # standard errors of the rate estimate (sqrt(rn^2 + HOT_RATE*DIT)/sqrt(N)/DIT), plus the
    # typical level's own uncertainty (median of the master, ~0.1 ADU, so 0.1 ADU/DIT).
    sig_rate = np.sqrt(READ_NOISE**2 + HOT_RATE * DIT) / np.sqrt(N_FRAME) / DIT
    for p in hot:
        expected = (truth[p] - np.median(truth)) / DIT
        assert abs(res.dark_rate[p] - expected) < 5 * sig_rate + 0.1 / DIT


def test_streaming_does_not_change_the_master(stack):
    """Chunking changes only the robust first pass, not which samples survive clipping."""
    frames = stack[0]
    one = master_dark(_source(frames, N_FRAME), dit=DIT)
    many = master_dark(_source(frames, 5), dit=DIT)
    np.testing.assert_allclose(many.master, one.master, rtol=0, atol=1e-9)
    assert np.array_equal(many.valid, one.valid)


def test_fringe_tracker_shaped_pixels(rng):
    """Pixel axes (output, ft_wave): 24 x 6 pixels, many 1-ms frames, 1 ADU read noise."""
    frames = 500.0 + rng.normal(0.0, 1.0, (3000, 24, 6))
    res = master_dark(_source(frames, 1000), dit=1e-3, hot_rate=5000.0)
    # Mean of 3000 unit-variance samples: standard error 0.018; 6 sigma bound.
    assert np.abs(res.master - 500.0).max() < 6 / np.sqrt(3000)
    # Noise estimate from 1500 pairs per pixel: relative error ~1.8 %; 10 % bound.
    assert np.abs(res.read_noise - 1.0).max() < 0.10
    assert res.valid.all()


def test_nan_samples_are_ignored(rng):
    frames = 100.0 + rng.normal(0.0, 2.0, (10, 4, 4))
    frames[3, 1, 1] = np.nan
    frames[:, 2, 2] = np.nan
    centre, n = robust_centre(iter([frames]))
    assert n == 10 and np.isfinite(centre[1, 1]) and np.isnan(centre[2, 2])
    res = master_dark(lambda: iter([frames]), dit=1.0)
    assert np.isfinite(res.master[1, 1]) and np.isnan(res.master[2, 2])
    assert not res.valid[2, 2] and res.valid[1, 1]


def test_too_few_frames_is_refused(rng):
    with pytest.raises(ValueError, match="at least 2 dark frames"):
        master_dark(lambda: iter([rng.normal(size=(1, 3, 3))]), dit=1.0)
    with pytest.raises(ValueError, match="dit must be positive"):
        master_dark(lambda: iter([rng.normal(size=(4, 3, 3))]), dit=0.0)
