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

from .earth_orientation import use_cached_table

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
    For many times within a day it is evaluated at the first, middle and last time and
    interpolated linearly (the sidereal rate is constant; nutation bends it by ~1e-8 rad
    over a day at most), provided the middle point agrees with the line to
    ``_LST_LINEAR_TOL``; otherwise at every time.

    Parameters
    ----------
    time : astropy.time.Time, any shape
    ra_deg, longitude_deg : float, degrees

    Returns
    -------
    h : ndarray, same shape as time, radians, wrapped to [-pi, pi)
    """
    lst = _local_sidereal_rad(time, longitude_deg)
    h = np.asarray(lst) - np.deg2rad(ra_deg)
    return (h + np.pi) % (2 * np.pi) - np.pi


_LST_LINEAR_TOL = 1e-9      # rad: 0.2 mas, far below any fringe-phase or delay requirement


def _local_sidereal_rad(time, longitude_deg: float) -> np.ndarray:
    import astropy.units as u

    use_cached_table()                  # UT1 - UTC without parsing astropy's text files

    def exact(t):
        return np.asarray(t.sidereal_time("apparent", longitude=longitude_deg * u.deg)
                          .to_value(u.rad))
    if time.size < 8:
        return exact(time)
    # elapsed atomic time: continuous across a leap second, as UT1 (and so LST) is
    elapsed = (time - time.ravel()[0]).to_value(u.day)
    first, last = int(np.argmin(elapsed)), int(np.argmax(elapsed))
    span = elapsed.flat[last] - elapsed.flat[first]
    if not 0 < span < 1.0:
        return exact(time)
    ends = time.ravel()[[first, last]]
    mid = ends[0] + (ends[1] - ends[0]) * 0.5
    lst0, lst1, lst_mid = exact(ends.insert(2, mid))
    turn = 2 * np.pi
    rise = (lst1 - lst0) % turn                       # less than a turn: span < 1 day
    if abs((lst_mid - lst0) % turn - 0.5 * rise) > _LST_LINEAR_TOL:
        return exact(time)
    frac = (elapsed - elapsed.flat[first]) / span
    return (lst0 + rise * frac) % turn


def parallactic_angle_rad(hour_angle, dec_rad, latitude_rad):
    """Parallactic angle (standard spherical astronomy formula), radians."""
    h = np.asarray(hour_angle, float)
    return np.arctan2(np.sin(h), np.tan(latitude_rad) * np.cos(dec_rad)
                      - np.sin(dec_rad) * np.cos(h))
