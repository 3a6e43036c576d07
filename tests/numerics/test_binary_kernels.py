# SPDX-License-Identifier: BSD-3-Clause
"""Factored kernels of the binary fit against the formulas evaluated directly.

References: the point-source phasor exp(-2 pi i (u x + v y) / lambda) and the binary
visibility of pipeline.skymodel (the simulator's formulas, OIFITS v2 sign convention,
Duvert, Young & Hummel 2017, A&A 597, A8); chi-square of V2 and of closure phases
(2 - 2 cos residual) summed by hand; derivatives by central finite differences.
"""

import lmfit
import numpy as np
import pytest

from pipeline.geometry import uvw_from_enu
from pipeline.numerics.binary_fit import Observables, _primary_grid
from pipeline.numerics.binary_model import (PARAM_NAMES, axis_phasors, binary_observables,
                                            binary_observables_batch, grid_chi2)
from pipeline.skymodel import MAS, binary_visibility, point_phasor

FIBRE = 60.0
WAVE = np.linspace(2.0e-6, 2.4e-6, 24)
BW = WAVE / 22
PAIRS = [(0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3)]


@pytest.fixture(scope="module")
def uvw(instrument):
    return uvw_from_enu(instrument.baseline_enu_m, np.deg2rad(-15.0), np.deg2rad(-28.0),
                        np.deg2rad(instrument.site.latitude_deg))[0]


def test_axis_phasors_against_point_phasor(uvw, rng):
    u, v = uvw[:, 0, None], uvw[:, 1, None]
    xs, ys = rng.uniform(-80, 80, 7) * MAS, rng.uniform(-80, 80, 5) * MAS
    px, py = axis_phasors(u, v, WAVE, xs, ys)
    for a, x in enumerate(xs):
        for b, y in enumerate(ys):
            direct = point_phasor(u, v, WAVE, x, y)
            # exp(a + b) = exp(a) exp(b): equal to rounding (phases up to ~100 rad)
            np.testing.assert_allclose(px[a] * py[b], direct, rtol=0, atol=1e-13)


def test_phasor_from_cosine_and_sine_against_point_phasor(rng):
    from pipeline.numerics.binary_model import _phasor
    u, v = rng.normal(0, 80, (6, 1)), rng.normal(0, 80, (6, 1))
    x, y = rng.uniform(-80, 80, (5, 1, 1)) * MAS, rng.uniform(-80, 80, (5, 1, 1)) * MAS
    got = _phasor(u, v, WAVE, x, y)
    assert got.shape == (5, 6, WAVE.size)
    np.testing.assert_allclose(got, point_phasor(u, v, WAVE, x, y), rtol=0, atol=1e-13)


@pytest.mark.parametrize("diameters", [(0.0, 0.0), (1.5, 0.8)])
def test_grid_chi2_on_square_grid_against_direct_chi2(uvw, rng, diameters):
    # A square grid (the factored path: per-axis phasors, couplings, path differences)
    # and 6 trial ratios; the reference sums the chi-square by hand from the model of
    # binary_observables, point by point.
    vis = binary_visibility(uvw[:, 0, None], uvw[:, 1, None], WAVE, dx_rad=8 * MAS,
                            dy_rad=5 * MAS, flux_ratio=0.3, bandwidth_m=BW,
                            fibre_fwhm_rad_at_2p2um=FIBRE * MAS)
    t3 = np.array([np.angle(vis[PAIRS.index((i, j))] * vis[PAIRS.index((j, k))]
                            * np.conj(vis[PAIRS.index((i, k))]))
                   for i, j, k in [(0, 1, 2), (0, 1, 3), (0, 2, 3), (1, 2, 3)]])
    v2 = np.abs(vis) ** 2 + rng.normal(0, 0.01, (2, 6, WAVE.size))
    t3 = t3 + rng.normal(0, 0.02, (2, 4, WAVE.size))
    e2, et = np.full(v2.shape, 0.01), np.full(t3.shape, 0.02)
    axis = np.arange(-4, 5) * 2.5
    xx, yy = np.meshgrid(axis, axis)
    ratios = np.array([0.01, 0.1, 0.2, 0.3, 0.5, 1.2])
    got = grid_chi2(v2, e2, t3, et, uvw, WAVE, dra_mas=xx.ravel(), ddec_mas=yy.ravel(),
                    flux_ratios=ratios, bandwidth_m=BW, fibre_fwhm_mas=FIBRE,
                    diameters_mas=diameters, chunk_positions=16)
    direct, v2_only = np.empty_like(got), np.empty_like(got)
    for n, (x, y) in enumerate(zip(xx.ravel(), yy.ravel())):
        for k, r in enumerate(ratios):
            m2, mt, _ = binary_observables(uvw, WAVE, dra_mas=x, ddec_mas=y, flux_ratio=r,
                                           bandwidth_m=BW, fibre_fwhm_mas=FIBRE,
                                           diameter1_mas=diameters[0],
                                           diameter2_mas=diameters[1])
            v2_only[n, k] = np.sum(((v2 - m2) / e2) ** 2)
            direct[n, k] = v2_only[n, k] + np.sum((2 - 2 * np.cos(t3 - mt)) / et ** 2)
    # Each position's minimum and its ratio: rounding only.
    np.testing.assert_allclose(got.min(1), direct.min(1), rtol=1e-9)
    np.testing.assert_allclose(direct[np.arange(len(got)), got.argmin(1)], direct.min(1),
                               rtol=1e-12)
    # Every other entry is its chi-square or, for a ratio that cannot be the minimum,
    # the V2 term alone (a lower bound above the minimum).
    value = np.isclose(got, direct, rtol=1e-9, atol=0)
    bound = np.isclose(got, v2_only, rtol=1e-9, atol=0) & (v2_only >= direct.min(1)[:, None])
    assert np.all(value | bound)
    assert value.sum() >= len(got) and bound.any()


def test_primary_grid_against_brute_force(uvw, rng):
    # The referenced-phase search of the primary's offset against the phase of
    # skymodel.binary_visibility evaluated at every grid point.
    truth = dict(dx_rad=11 * MAS, dy_rad=-6 * MAS, flux_ratio=0.4, x1_rad=3 * MAS,
                 y1_rad=-2 * MAS, bandwidth_m=BW, fibre_fwhm_rad_at_2p2um=FIBRE * MAS)
    u, v = uvw[:, 0, None], uvw[:, 1, None]
    ph = np.angle(binary_visibility(u, v, WAVE, **truth)) + rng.normal(0, 0.05, (1, 6, WAVE.size))
    obs = Observables(vis2=np.ones((1, 6, WAVE.size)), vis2_err=np.ones((1, 6, WAVE.size)),
                      t3phi=np.zeros((1, 4, WAVE.size)), t3phi_err=np.ones((1, 4, WAVE.size)),
                      uvw=uvw, wave=WAVE, bandwidth=BW, visphi=ph,
                      visphi_err=np.full(ph.shape, 0.05))
    params = lmfit.Parameters()
    for name, value in (("dra", 11.0), ("ddec", -6.0), ("flux_ratio", 0.4), ("flux_slope", 0.0)):
        params.add(name, value=value)
    step, radius = 0.9, 12.0
    ch = np.arange(WAVE.size)
    got = _primary_grid(obs, params, ch, step=step, radius=radius, fibre_fwhm_mas=FIBRE)
    axis = np.arange(-np.ceil(radius / step), np.ceil(radius / step) + 1) * step
    best, best_xy = np.inf, None
    for x in axis:
        for y in axis:
            if np.hypot(x, y) > radius:
                continue
            model = np.angle(binary_visibility(u, v, WAVE, **{**truth, "x1_rad": x * MAS,
                                                               "y1_rad": y * MAS}))
            c = -np.sum(np.cos(ph - model) / 0.05 ** 2)
            if c < best:
                best, best_xy = c, (x, y)
    assert got == pytest.approx(best_xy, abs=1e-12)
    assert np.hypot(got[0] - 3, got[1] + 2) < step          # and near the truth


def test_single_frame_derivatives_against_finite_differences(rng):
    # One frame: the closure-phase derivative is formed from the baselines' phase
    # derivatives; central differences of binary_observables_batch (step 1e-5).
    uvw = rng.normal(0, 60, (6, 3))
    p = dict(dra=rng.normal(0, 20, 3), ddec=rng.normal(0, 20, 3),
             flux_ratio=rng.uniform(0.05, 1, 3), flux_slope=rng.normal(0, 1, 3),
             primary_dra=rng.normal(0, 3, 3), primary_ddec=rng.normal(0, 3, 3),
             diameter1=np.array([0, 1.0, 0.3]), diameter2=np.array([0.5, 0, 1.2]))
    kw = dict(bandwidth_m=BW, fibre_fwhm_mas=FIBRE)
    got = binary_observables_batch(uvw, WAVE, p, derivatives=PARAM_NAMES, **kw)
    h = 1e-5
    for j, name in enumerate(PARAM_NAMES):
        up = binary_observables_batch(uvw, WAVE, {**p, name: p[name] + h}, **kw)
        down = binary_observables_batch(uvw, WAVE, {**p, name: p[name] - h}, **kw)
        for q in range(3):
            fd = up[q] - down[q]
            fd = (np.angle(np.exp(1j * fd)) if q else fd) / (2 * h)
            np.testing.assert_allclose(got[3 + q][:, j], fd, rtol=1e-6,
                                       atol=1e-7 * np.abs(got[3 + q]).max())
