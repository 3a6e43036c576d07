# SPDX-License-Identifier: BSD-3-Clause
"""pipeline.geometry against astropy: the geometric delay B . s_hat computed from
astropy AltAz unit vectors (ENU: E = cos alt sin az, N = cos alt cos az, U = sin alt)."""

import astropy.units as u
import numpy as np
import pytest
from astropy.coordinates import TETE, AltAz, SkyCoord
from astropy.time import Time
from astropy.utils import iers

from pipeline.geometry import hour_angle_rad, uvw_from_enu

ARCSEC = np.pi / 180 / 3600


def _shat(coord, frame):
    a = coord.transform_to(frame)
    alt, az = a.alt.rad, a.az.rad
    return np.array([np.cos(alt) * np.sin(az), np.cos(alt) * np.cos(az), np.sin(alt)])


@pytest.mark.parametrize("when,ra,dec", [("2026-04-18T12:30:00", 172.5, -32.0),
                                         ("2026-04-18T10:00:00", 200.0, -60.0),
                                         ("2026-04-18T15:00:00", 150.0, 5.0)])
def test_uvw_matches_astropy_altaz(instrument, when, ra, dec):
    loc = instrument.site.earth_location()
    t = Time(when, scale="utc")
    offset = 5.0                                             # arcsec
    with iers.conf.set_temp("auto_download", False):
        # apparent place of date (TETE): the hour angle uses the apparent sidereal time,
        # so precession, nutation and annual aberration are out of the comparison
        src = SkyCoord(ra=ra * u.deg, dec=dec * u.deg, frame=TETE(obstime=t, location=loc))
        east = src.spherical_offsets_by(offset * u.arcsec, 0 * u.arcsec)
        north = src.spherical_offsets_by(0 * u.arcsec, offset * u.arcsec)
        altaz = AltAz(obstime=t, location=loc, pressure=0 * u.hPa)   # no refraction
        s0, se, sn = (_shat(c, altaz) for c in (src, east, north))
    b = instrument.baseline_enu_m
    h = hour_angle_rad(t, src.ra.deg, instrument.site.longitude_deg)
    uvw = uvw_from_enu(b, h, src.dec.rad, np.deg2rad(instrument.site.latitude_deg))[0]
    # w is the delay B . s_hat. What astropy includes and the projection does not: polar
    # motion (<~0.5 arcsec) and diurnal aberration (<=0.32 arcsec), i.e. < 5 urad x |B|
    # (<= 130 m): 0.6 mm
    np.testing.assert_allclose(b @ s0, uvw[:, 2], atol=6e-4)
    # a source offset East by d changes the delay by u d, North by v d. Second-order term
    # |B| d^2 / 2 <= 130 m x (2.4e-5)^2 / 2 = 40 nm: 50 nm tolerance (the offsets are in
    # mm, so this checks the sign and scale of u and v to ~1e-5)
    d = offset * ARCSEC
    np.testing.assert_allclose(b @ se - b @ s0, uvw[:, 0] * d, atol=5e-8)
    np.testing.assert_allclose(b @ sn - b @ s0, uvw[:, 1] * d, atol=5e-8)
    assert np.abs(uvw[:, 0] * d).max() > 1e-4              # the check is not vacuous


def test_uvw_is_a_rotation(instrument, rng):
    """(u, v, w) is a rotation of the baseline vector: |(u, v, w)| = |B|."""
    b = instrument.baseline_enu_m
    h = rng.uniform(-np.pi, np.pi, 50)
    dec = rng.uniform(-np.pi / 2, np.pi / 2, 50)
    uvw = uvw_from_enu(b, h, dec, np.deg2rad(instrument.site.latitude_deg))
    # exact up to floating-point rounding
    np.testing.assert_allclose(np.linalg.norm(uvw, axis=-1),
                               np.broadcast_to(np.linalg.norm(b, axis=-1), uvw.shape[:2]),
                               rtol=1e-12)


@pytest.mark.parametrize("start, span_s", [("2026-04-18T02:10:00", 600.0),     # one exposure
                                            ("2026-04-18T00:00:00", 6 * 3600.0),  # a night
                                            ("2016-12-31T23:50:00", 1200.0)])     # leap second
def test_hour_angle_of_many_times_matches_astropy_at_each(instrument, start, span_s):
    # reference: astropy's apparent sidereal time evaluated at every time (the function
    # evaluates it at three and interpolates when the sidereal time is linear to 1e-9 rad)
    t = Time(start, scale="utc") + np.linspace(0.0, span_s, 257) * u.s
    lon = instrument.site.longitude_deg
    lst = t.sidereal_time("apparent", longitude=lon * u.deg).to_value(u.rad)
    expected = (lst - np.deg2rad(150.0) + np.pi) % (2 * np.pi) - np.pi
    h = hour_angle_rad(t, 150.0, lon)
    diff = (h - expected + np.pi) % (2 * np.pi) - np.pi
    assert np.abs(diff).max() < 2e-9
    # the wrap to [-pi, pi)
    assert h.min() >= -np.pi and h.max() < np.pi
