# SPDX-License-Identifier: BSD-3-Clause
"""Time series of one exposure: injection, fringe-tracking residuals, events, metrology.

All series are sampled on a regular clock of ``n_sub_t`` samples per fringe-tracker
frame. Correlated noise is a first-order autoregressive process (AR(1)),
x[n] = a x[n-1] + sqrt(1 - a^2) e[n], a = exp(-dt / tau), unit variance.
"""

from __future__ import annotations

import numpy as np
from scipy.signal import lfilter

__all__ = ["ar1", "injection", "residuals"]


def ar1(rng: np.random.Generator, n: int, m: int, dt: float, tau: float) -> np.ndarray:
    """Unit-variance AR(1) series, shape (n, m), correlation time ``tau`` (s)."""
    a = np.exp(-dt / tau)
    e = rng.standard_normal((n, m)) * np.sqrt(1 - a * a)
    e[0] = rng.standard_normal(m)
    return lfilter([1.0], [1.0, -a], e, axis=0)


def injection(rng, n: int, dt: float, knobs: dict) -> np.ndarray:
    """Per-telescope coupling (Strehl x fibre injection), shape (n, 4), lognormal around
    ``knobs['mean']`` with log-sigma ``log_sigma`` and correlation ``corr_ms``; <= 1."""
    s = knobs["log_sigma"]
    x = ar1(rng, n, 4, dt, knobs["corr_ms"] * 1e-3)
    return np.minimum(knobs["mean"] * np.exp(s * x - s * s / 2), 1.0)


def residuals(rng, n: int, dt: float, knobs: dict, ft_wave_m: float):
    """Closed-loop residual path per telescope, shape (n, 4), metres, and its events.

    Per-telescope rms is residual_rms_nm / sqrt(2) so each baseline has residual_rms_nm.
    Fringe jumps shift one telescope's residual by +-ft_wave_m for a while; lock losses
    scramble every telescope's residual by an AR(1) of ``lockloss_scramble_um`` rms and
    10 ms correlation. Returns (r, events) with events a list of dicts
    {kind, telescope (-1 = all), t_start, t_end (s from the series start), offset_m}.
    """
    rms = knobs["residual_rms_nm"] * 1e-9 / np.sqrt(2)
    r = rms * ar1(rng, n, 4, dt, knobs["corr_ms"] * 1e-3)
    duration = n * dt
    events = []
    for kind, rate, (dmin, dmax) in (
            ("jump", knobs["jump_rate_per_min"], knobs["jump_duration_s"]),
            ("lock_loss", knobs["lockloss_rate_per_min"], knobs["lockloss_duration_s"])):
        for _ in range(rng.poisson(rate * duration / 60.0)):
            t0 = rng.uniform(0, duration)
            t1 = min(duration, t0 + rng.uniform(dmin, dmax))
            i0, i1 = int(t0 / dt), int(np.ceil(t1 / dt))
            if kind == "jump":
                tel = int(rng.integers(4))
                off = float(rng.choice([-1.0, 1.0]) * ft_wave_m)
                r[i0:i1, tel] += off
            else:
                tel, off = -1, 0.0
                sc = knobs["lockloss_scramble_um"] * 1e-6
                r[i0:i1] += sc * ar1(rng, max(i1 - i0, 1), 4, dt, 0.01)[: i1 - i0]
            events.append({"kind": kind, "telescope": tel, "t_start": t0, "t_end": t1,
                           "offset_m": off})
    events.sort(key=lambda e: e["t_start"])
    return r, events
