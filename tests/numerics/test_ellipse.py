# SPDX-License-Identifier: BSD-3-Clause
"""Separation, position angle and error ellipse against astropy and an eigen-decomposition."""

import numpy as np
import pytest

import astropy.units as u
from astropy.coordinates import SkyCoord

from pipeline.numerics.ellipse import correlation, error_ellipse, sep_pa


@pytest.mark.parametrize("dra, ddec", [(12.0, 5.0), (-30.0, 8.0), (-4.0, -20.0), (7.0, -9.5),
                                       (0.0, 15.0), (25.0, 0.0)])
def test_sep_pa_against_astropy(dra, ddec):
    # Independent: astropy spherical offsets (dRA cos Dec, dDec) from a base position,
    # then astropy's separation and position_angle (East of North).
    base = SkyCoord(83.3 * u.deg, -31.7 * u.deg)
    comp = base.spherical_offsets_by(dra * u.mas, ddec * u.mas)
    res = sep_pa(dra, ddec)
    # Offsets of tens of mas: the tangent-plane approximation differs from the sphere
    # by ~ sep^3 (radians), negligible; the limit is double precision of coordinates in
    # degrees (1 ulp of 83 deg ~ 5e-8 mas), hence 1e-6 mas and 1e-5 deg.
    assert res.sep == pytest.approx(base.separation(comp).to_value(u.mas), abs=1e-6)
    pa_astropy = base.position_angle(comp).to_value(u.deg) % 360
    assert abs((res.pa - pa_astropy + 180) % 360 - 180) < 1e-5


def test_ellipse_against_eigendecomposition(rng):
    for _ in range(20):
        a = rng.normal(size=(2, 2))
        cov = a @ a.T + 0.01 * np.eye(2)
        ell = error_ellipse(cov)
        # Independent: numpy eigh; the major axis is the eigenvector of the largest
        # eigenvalue, PA = atan2(East, North) folded to [0, 180).
        vals, vecs = np.linalg.eigh(cov)
        major = vecs[:, 1]
        pa = np.degrees(np.arctan2(major[0], major[1])) % 180
        assert ell.semi_major == pytest.approx(np.sqrt(vals[1]), rel=1e-10)
        assert ell.semi_minor == pytest.approx(np.sqrt(vals[0]), rel=1e-8)
        assert abs((ell.pa_deg - pa + 90) % 180 - 90) < 1e-8


def test_ellipse_axis_aligned():
    # An ellipse elongated North-South has its major axis at PA 0; East-West at PA 90.
    assert error_ellipse([[1.0, 0.0], [0.0, 4.0]]).pa_deg == pytest.approx(0.0, abs=1e-12)
    e = error_ellipse([[9.0, 0.0], [0.0, 1.0]])
    assert (e.semi_major, e.semi_minor, e.pa_deg) == pytest.approx((3.0, 1.0, 90.0))
    assert np.isnan(error_ellipse(np.full((2, 2), np.nan)).semi_major)


def test_sep_pa_errors_against_monte_carlo(rng):
    # Independent: sample the 2-D Gaussian and take the spread of hypot / arctan2.
    dra, ddec = 20.0, -14.0
    cov = np.array([[0.04, 0.015], [0.015, 0.09]])
    xy = rng.multivariate_normal([dra, ddec], cov, size=200_000)
    res = sep_pa(dra, ddec, cov)
    # 200000 samples: the standard deviation is known to ~0.2 %; the linearisation is
    # good to (err/sep)^2 ~ 1e-4. Allow 1 %.
    assert res.sep_err == pytest.approx(np.std(np.hypot(xy[:, 0], xy[:, 1])), rel=0.01)
    pa = np.degrees(np.arctan2(xy[:, 0], xy[:, 1]))
    assert res.pa_err == pytest.approx(np.std(pa), rel=0.01)
    assert correlation(cov) == pytest.approx(0.015 / np.sqrt(0.04 * 0.09))


def test_bad_covariance_shape():
    with pytest.raises(ValueError, match=r"shape \(2, 2\)"):
        error_ellipse(np.eye(3))
