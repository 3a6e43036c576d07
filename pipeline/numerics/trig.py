# SPDX-License-Identifier: BSD-3-Clause
"""Cosine, sine and sinc of large arrays to a few 1e-7, for model evaluations; phase
wrapping.

numpy evaluates float32 ``cos`` and ``sin`` with vectorised (SIMD) code and float64 ones
one element at a time: on x86-64 the float32 functions are 20-50 times faster. Fringe
models of noisy data and averages of fringe phasors need nothing like float64's 1e-16;
here the phase is reduced to [-pi, pi] in float64 (no precision lost however many
turns it spans), the functions are evaluated in float32 and returned as float64.

Absolute error <= 3e-7 (float32 rounding of the reduced phase, 1.2e-7, plus the float32
functions' ~1 ulp) for |phase| below ~1e8 rad. Not for finite-difference derivatives,
which a 1e-7 step would swamp; the binary-model fits keep float64.

Axes: any shape; results have the shape of the input.
"""

from __future__ import annotations

import numpy as np

__all__ = ["cos_sin", "cis", "sinc", "wrap_phase"]

_TWO_PI = 2 * np.pi


def _reduced32(phase):
    """phase (rad, float64) -> the same angle in [-pi, pi], float32."""
    turns = np.multiply(phase, 1 / _TWO_PI, dtype=float)
    turns -= np.rint(turns)
    turns *= _TWO_PI
    return turns.astype(np.float32)


def cos_sin(phase):
    """(cos(phase), sin(phase)) as float64 arrays, to within 3e-7 absolute."""
    r = _reduced32(phase)
    return np.cos(r).astype(float), np.sin(r).astype(float)


def cis(phase, dtype=complex):
    """exp(i phase) as ``dtype`` (complex128 or complex64), to within 3e-7 absolute (each
    of its parts)."""
    r = _reduced32(phase)
    out = np.empty(r.shape, dtype)
    out.real = np.cos(r)
    out.imag = np.sin(r)
    return out


def sinc(x):
    """sin(pi x) / (pi x), 1 at x = 0 (``numpy.sinc``), to within 3e-7 absolute."""
    y = np.multiply(x, np.pi, dtype=float)
    s = np.sin(_reduced32(y)).astype(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        s /= y
    # near zero the float32 sine loses the argument (1e-40 is subnormal, 1e-300 zero):
    # 1 - y^2 / 6 there, off by y^4 / 120 < 1e-14
    near = np.abs(y) < 1e-3
    if near.any():
        return np.where(near, 1.0 - y * y / 6, s)
    return s


def wrap_phase(phi):
    """Radians wrapped to (-pi, pi], in float64 (whole turns removed: exact to the
    rounding of the result; a complex exponential and its argument cost ten times more).
    NaN and inf give NaN."""
    phi = np.asarray(phi, float)
    with np.errstate(invalid="ignore"):                   # inf - inf: NaN, as documented
        out = phi - _TWO_PI * np.rint(phi * (1 / _TWO_PI))
    return np.where(out <= -np.pi, out + _TWO_PI, out)
