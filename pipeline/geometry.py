# SPDX-License-Identifier: BSD-3-Clause
"""Array geometry: hour angle and (u, v, w) of every baseline.

Conventions (see README): station positions in local East/North/Up metres,
baseline B_ij = P_j - P_i; (u, v, w) by the standard equatorial projection
(Thompson, Moran & Swenson, Interferometry and Synthesis in Radio Astronomy,
ch. 4, eqs. 4.1-4.3), u toward East, v toward North, w toward the source, metres.
w is the geometric delay path B . s_hat for the phase centre.
"""

from __future__ import annotations

import numpy as np

__all__ = ["enu_to_equatorial", "uvw_from_enu", "hour_angle_rad", "parallactic_angle_rad"]


def enu_to_equatorial(enu_m, latitude_rad: float) -> np.ndarray:
    """Rotate local (East, North, Up) vectors to equatorial (X, Y, Z).

    X points to the meridian on the celestial equator (H = 0, Dec = 0),
    Y to the East (H = -6 h), Z to the north celestial pole.

    Parameters
    ----------
    enu_m : array_like, shape (..., 3), metres
    latitude_rad : float, site geodetic latitude, radians

    Returns
    -------
    xyz_m : ndarray, shape (..., 3), metres
    """
    enu = np.asarray(enu_m, float)
    e, n, up = enu[..., 0], enu[..., 1], enu[..., 2]
    sl, cl = np.sin(latitude_rad), np.cos(latitude_rad)
    return np.stack([-sl * n + cl * up, e, cl * n + sl * up], axis=-1)


def uvw_from_enu(enu_m, hour_angle_rad, dec_rad, latitude_rad: float) -> np.ndarray:
    """Projected baseline coordinates.

    Parameters
    ----------
    enu_m : array_like, shape (n_baseline, 3), metres
        Baseline vectors B_ij = P_j - P_i in East/North/Up.
    hour_angle_rad : array_like, shape (n_time,) or scalar, radians
    dec_rad : float or array_like broadcastable with hour_angle_rad, radians
    latitude_rad : float, radians

    Returns
    -------
    uvw_m : ndarray, shape (n_time, n_baseline, 3), metres
        (u, v, w): u toward East, v toward North, w along the source direction.
    """
    xyz = enu_to_equatorial(enu_m, latitude_rad)                  # (n_baseline, 3)
    h = np.atleast_1d(np.asarray(hour_angle_rad, float))[:, None]  # (n_time, 1)
    d = np.broadcast_to(np.atleast_1d(np.asarray(dec_rad, float)), h.shape[:1])[:, None]
    x, y, z = xyz[None, :, 0], xyz[None, :, 1], xyz[None, :, 2]
    sh, ch, sd, cd = np.sin(h), np.cos(h), np.sin(d), np.cos(d)
    u = sh * x + ch * y
    v = -sd * ch * x + sd * sh * y + cd * z
    w = cd * ch * x - cd * sh * y + sd * z
    return np.stack(np.broadcast_arrays(u, v, w), axis=-1)


def hour_angle_rad(time, ra_deg: float, longitude_deg: float) -> np.ndarray:
    """Hour angle of right ascension ``ra_deg`` at ``time`` seen from ``longitude_deg``.

    Uses the apparent local sidereal time of astropy (IERS tables bundled, no download).

    Parameters
    ----------
    time : astropy.time.Time, any shape
    ra_deg, longitude_deg : float, degrees

    Returns
    -------
    h : ndarray, same shape as time, radians, wrapped to [-pi, pi)
    """
    import astropy.units as u
    lst = time.sidereal_time("apparent", longitude=longitude_deg * u.deg).to_value(u.rad)
    h = np.asarray(lst) - np.deg2rad(ra_deg)
    return (h + np.pi) % (2 * np.pi) - np.pi


def parallactic_angle_rad(hour_angle, dec_rad, latitude_rad):
    """Parallactic angle (standard spherical astronomy formula), radians."""
    h = np.asarray(hour_angle, float)
    return np.arctan2(np.sin(h), np.tan(latitude_rad) * np.cos(dec_rad)
                      - np.sin(dec_rad) * np.cos(h))
