# SPDX-License-Identifier: BSD-3-Clause
"""The sky-model formulas shared by the simulator and the fit, against outside references."""

import numpy as np
import pytest
from scipy.special import j1

from pipeline.geometry import uvw_from_enu
from pipeline.skymodel import (MAS, binary_visibility, point_phasor, smearing_envelope,
                               uniform_disk_visibility)


def test_east_companion_phase_follows_the_geometric_delay(instrument):
    """A source offset by dx to the East has an extra geometric delay B . ds = u dx
    (the delay w of the offset direction minus that of the phase centre, computed here
    directly from the rotation of pipeline.geometry, independent of the phase formula).
    With the convention V = exp(-2 pi i (u x + v y) / lambda) of OIFITS v2
    (Duvert, Young & Hummel 2017, A&A 597, A8) the phase is -2 pi (w' - w) / lambda."""
    lat, dec, h = np.deg2rad(instrument.site.latitude_deg), np.deg2rad(-32.0), 0.4
    dx = 20 * MAS
    base = instrument.baseline_enu_m
    w0 = uvw_from_enu(base, h, dec, lat)[0, :, 2]
    # Moving East on the sky at fixed Dec is a smaller hour angle: H' = H - dx / cos(Dec).
    w1 = uvw_from_enu(base, h - dx / np.cos(dec), dec, lat)[0, :, 2]
    u = uvw_from_enu(base, h, dec, lat)[0, :, 0]
    wave = 2.2e-6
    phase = np.angle(point_phasor(u, 0.0, wave, dx, 0.0))
    expected = np.angle(np.exp(-2j * np.pi * (w1 - w0) / wave))
    # tolerance: the second-order term w dx^2 / 2 ~ 100 m * (1e-7)^2 / 2 = 5e-13 m of the
    # exact delay, i.e. ~1.4e-6 rad of phase at 2.2 um
    np.testing.assert_allclose(phase, expected, atol=5e-6)
    # and the docs' statement: a companion to the East gives a negative phase slope along u
    assert np.all(np.sign(phase[np.abs(u * dx / wave) < 0.25]) == -np.sign(
        u[np.abs(u * dx / wave) < 0.25]))


def test_uniform_disk_against_scipy_j1_and_first_null():
    """2 J1(x)/x with x = pi theta |b| / lambda (Born & Wolf, Principles of Optics, 8.5.2),
    against scipy.special.j1 directly; first null at x = 3.8317 (Born & Wolf; value from
    memory, equal to the first zero of J1, also checked with scipy)."""
    from scipy.special import jn_zeros
    wave, theta = 2.2e-6, 3.0 * MAS
    b = np.linspace(1.0, 150.0, 200)
    x = np.pi * theta * b / wave
    np.testing.assert_allclose(uniform_disk_visibility(b, 0.0, wave, theta), 2 * j1(x) / x,
                               rtol=1e-12)
    assert jn_zeros(1, 1)[0] == pytest.approx(3.8317, abs=1e-4)
    b_null = 3.8317 * wave / (np.pi * theta)
    assert abs(uniform_disk_visibility(b_null, 0.0, wave, theta)) < 1e-4
    assert uniform_disk_visibility(0.0, 0.0, wave, theta) == pytest.approx(1.0)


def test_binary_squared_visibility_closed_form(rng):
    """|V|^2 = (1 + f^2 + 2 f cos(2 pi B.s / lambda)) / (1 + f)^2 for two points
    (standard closed form of a binary's visibility)."""
    u, v = rng.uniform(-130, 130, (2, 50))
    wave, f = 2.1e-6, 0.3
    dx, dy = 12 * MAS, -25 * MAS
    vis = binary_visibility(u, v, wave, dx_rad=dx, dy_rad=dy, flux_ratio=f)
    arg = 2 * np.pi * (u * dx + v * dy) / wave
    np.testing.assert_allclose(np.abs(vis) ** 2, (1 + f ** 2 + 2 * f * np.cos(arg)) / (1 + f) ** 2,
                               rtol=1e-12)


def test_binary_closure_phase_equals_explicit_triple_product(instrument):
    """Closure phase = arg(V_ij V_jk conj(V_ik)), with each V_ij computed explicitly as
    (1 + f exp(-2 pi i B_ij.s / lambda)) / (1 + f); the primary's offset cancels."""
    lat, dec = np.deg2rad(instrument.site.latitude_deg), np.deg2rad(-20.0)
    uvw = uvw_from_enu(instrument.baseline_enu_m, 0.2, dec, lat)[0]
    wave, f, dx, dy = 2.3e-6, 0.6, 8 * MAS, 5 * MAS
    bidx = {b: n for n, b in enumerate(instrument.combiner.baselines)}
    for x1 in (0.0, 3 * MAS):
        vis = binary_visibility(uvw[:, 0], uvw[:, 1], wave, dx_rad=dx, dy_rad=dy,
                                flux_ratio=f, x1_rad=x1)
        for i, j, k in instrument.combiner.triangles:
            cp = np.angle(vis[bidx[i, j]] * vis[bidx[j, k]] * np.conj(vis[bidx[i, k]]))
            explicit = [(1 + f * np.exp(-2j * np.pi * (uvw[n, 0] * dx + uvw[n, 1] * dy) / wave))
                        / (1 + f) for n in (bidx[i, j], bidx[j, k], bidx[i, k])]
            ref = np.angle(explicit[0] * explicit[1] * np.conj(explicit[2]))
            assert cp == pytest.approx(ref, abs=1e-10)


def test_smearing_envelope_is_the_fourier_pair_of_a_gaussian_band():
    """Numerical average of exp(-2 pi i opd / lambda) over a Gaussian band in wavenumber
    equals the analytic envelope (Fourier pair of a Gaussian)."""
    wave, band, opd = 2.2e-6, 4.4e-9, 300e-6
    sig0, dsig = 1 / wave, band / wave ** 2
    s = np.linspace(sig0 - 4 * dsig, sig0 + 4 * dsig, 20001)
    weight = np.exp(-4 * np.log(2) * ((s - sig0) / dsig) ** 2)
    numeric = abs(np.sum(weight * np.exp(-2j * np.pi * opd * s)) / weight.sum())
    assert numeric == pytest.approx(float(smearing_envelope(opd, wave, band)), rel=1e-6)
