# SPDX-License-Identifier: BSD-3-Clause
"""Error ellipse and separation / position angle of a relative sky offset.

Offsets are x = dRA cos(Dec) (East positive) and y = dDec (North positive), in
mas. Position angles are degrees East of North (from North through East), in
[0, 360) for a position and [0, 180) for an ellipse's major axis. Errors are
propagated to first order from the 2x2 covariance (the linear error propagation
of e.g. Bevington & Robinson, Data Reduction and Error Analysis, ch. 3); the
ellipse axes are the square roots of the covariance eigenvalues (1-sigma).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["ErrorEllipse", "SepPA", "error_ellipse", "sep_pa", "correlation"]


@dataclass(frozen=True)
class ErrorEllipse:
    """1-sigma error ellipse: semi-axes in mas, major-axis PA in degrees East of North."""
    semi_major: float
    semi_minor: float
    pa_deg: float


@dataclass(frozen=True)
class SepPA:
    """Separation (mas) and position angle (deg East of North) with 1-sigma errors."""
    sep: float
    sep_err: float
    pa: float
    pa_err: float


def _check_cov(cov) -> np.ndarray:
    c = np.asarray(cov, float)
    if c.shape != (2, 2):
        raise ValueError(f"cov must have shape (2, 2) (x East, y North), found {c.shape}")
    return c


def correlation(cov) -> float:
    """Correlation coefficient of x and y from a 2x2 covariance (NaN if a variance is 0/NaN)."""
    c = _check_cov(cov)
    denom = np.sqrt(c[0, 0] * c[1, 1])
    return float(c[0, 1] / denom) if np.isfinite(denom) and denom > 0 else float("nan")


def error_ellipse(cov) -> ErrorEllipse:
    """1-sigma error ellipse of a 2-D offset.

    Parameters
    ----------
    cov : array_like, shape (2, 2), mas^2
        Covariance of (x East, y North). NaN entries give a NaN ellipse.

    Returns
    -------
    ErrorEllipse
        ``pa_deg`` in [0, 180): angle of the major axis from North through East.
    """
    c = _check_cov(cov)
    if not np.all(np.isfinite(c)):
        return ErrorEllipse(np.nan, np.nan, np.nan)
    sxx, syy, sxy = c[0, 0], c[1, 1], 0.5 * (c[0, 1] + c[1, 0])
    # Closed-form eigenvalues of a symmetric 2x2 matrix.
    mean, half = 0.5 * (sxx + syy), np.hypot(0.5 * (sxx - syy), sxy)
    lam1, lam2 = mean + half, max(mean - half, 0.0)
    # Major-axis direction (x, y) satisfies tan(2 theta_x) = 2 sxy / (sxx - syy), theta_x
    # measured from the x (East) axis; PA from North through East is 90 deg - theta_x.
    theta_x = 0.5 * np.arctan2(2 * sxy, sxx - syy)
    pa = (90.0 - np.degrees(theta_x)) % 180.0
    return ErrorEllipse(float(np.sqrt(lam1)), float(np.sqrt(lam2)), float(pa))


def sep_pa(dra_mas: float, ddec_mas: float, cov=None) -> SepPA:
    """Separation and position angle of an offset, with errors from its covariance.

    Parameters
    ----------
    dra_mas, ddec_mas : float, x = dRA cos(Dec) East and y = dDec North, mas
    cov : array_like, shape (2, 2), mas^2, or None (errors NaN)

    Returns
    -------
    SepPA
        ``pa`` in [0, 360) degrees East of North; ``pa_err`` in degrees.
    """
    x, y = float(dra_mas), float(ddec_mas)
    sep = float(np.hypot(x, y))
    pa = float(np.degrees(np.arctan2(x, y)) % 360.0)
    if cov is None or sep == 0:
        return SepPA(sep, np.nan, pa, np.nan)
    c = _check_cov(cov)
    # Jacobian of (sep, pa[rad]) with respect to (x, y).
    jac = np.array([[x / sep, y / sep], [y / sep ** 2, -x / sep ** 2]])
    cp = jac @ c @ jac.T
    return SepPA(sep, float(np.sqrt(cp[0, 0])), pa, float(np.degrees(np.sqrt(cp[1, 1]))))
