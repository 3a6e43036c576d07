# SPDX-License-Identifier: BSD-3-Clause
"""Binary-star fit to calibrated interferometric observables: global grid search,
lmfit refinement from the best few minima, covariance and bootstrap errors, flags.

Method. The chi-square surface of a binary in (dRA, dDec) is multi-modal with a
period of about one fringe spacing lambda/B, so a local optimiser alone finds the
nearest local minimum. We evaluate chi-square (squared visibilities and closure
phases) on a square grid over the fibre's field with a step of at most a quarter
of the smallest fringe spacing lambda_min / B_max, profiling the flux ratio over a
small logarithmic grid, then refine the best few distinct local minima with a
Levenberg-Marquardt least-squares fit (lmfit; More 1978, in Numerical Analysis,
Springer LNM 630, 105) of the full model, including referenced phases and the
primary's offset from the science pointing when calibrated phases are given. This
is the approach of e.g. Le Bouquin & Absil 2012, A&A 541, A89 (chi-square maps of
companion searches with interferometric closure phases and V2).

Errors. The lmfit covariance (from the Jacobian at the optimum) is scaled by
chi2_red when chi2_red > 1. Bootstraps give further covariances: over frames when
realisations of the observables are supplied (``vis2_boot`` ...; realisations
drawn from the frame-bootstrap covariance between channels,
``pipeline.numerics.correlated_draws``, are labelled "covariance"), and always
over spectral channels (each resample draws channels with replacement, keeping
every baseline and triangle of a channel together; Efron & Tibshirani 1993, An
Introduction to the Bootstrap, ch. 6), which also sees residual errors correlated
between channels that the quoted errors miss. The realisations are refitted from
the best fit all at once (:func:`refit_batch`: Levenberg-Marquardt vectorised over
realisations, analytic Jacobian, lmfit's stopping rule), the same least-squares
problem lmfit solves for the data. The largest covariance (by the trace
of the position block) is reported; likewise for the primary's offset, and every
other error is the largest of the estimates. The flux-ratio error adds the
uncertainty of the pair's place in the fibre (``pointing_sigma_mas``).

Assumption: without referenced phases the primary is taken at the science
fibre's centre (the commanded pointing) for the fibre attenuation and the
smearing envelope; with them its offset is fitted.

Flags (bit mask, :data:`FLAGS`):

* 1 ``ambiguous``: a distinct runner-up minimum within ``ambiguous_dchi2`` (chi-square
  scaled by max(1, chi2_red)) of the best one, e.g. the 180-degree ambiguity of a
  near-equal binary;
* 2 ``field_edge``: best position within one grid step of the search radius;
* 4 ``flux_ratio_zero``: flux ratio below 3 sigma;
* 8 ``chi2_red``: reduced chi-square outside ``chi2_red_range``;
* 16 ``no_covariance``: lmfit could not estimate a covariance (bootstrap only).
"""

from __future__ import annotations

import json
import warnings
from dataclasses import dataclass, field
from typing import Literal

import numpy as np

from pipeline.numerics.binary_model import (BASELINES, PARAM_NAMES, TRIANGLES, axis_phasors,
                                            binary_observables_batch, flux_ratio_law, grid_chi2,
                                            make_residual, wrap)
from pipeline.numerics.ellipse import ErrorEllipse, SepPA, correlation, error_ellipse, sep_pa
from pipeline.skymodel import MAS, fibre_coupling, point_phasor

__all__ = ["FLAGS", "BOOT_NAMES", "SEARCH_FIELDS", "Observables", "BinaryFitResult",
           "GridSearch", "RefinedFit", "fit_binary", "grid_search", "refine_binary",
           "summarise_fit", "search_grid", "refit_batch", "params_to_json",
           "params_from_json"]

FLAGS = {"ambiguous": 1, "field_edge": 2, "flux_ratio_zero": 4, "chi2_red": 8,
         "no_covariance": 16}
"""Bit of each quality flag of :class:`BinaryFitResult`."""


@dataclass(frozen=True, eq=False)
class Observables:
    """Calibrated observables of one exposure (never modified by the fit).

    Attributes
    ----------
    vis2, vis2_err : ndarray, shape (n_pol, n_baseline, n_wave)
    t3phi, t3phi_err : ndarray, shape (n_pol, n_triangle, n_wave), radians
    uvw : ndarray, shape (n_baseline, 3) or (n_time, n_baseline, 3), metres
    wave : ndarray, shape (n_wave,), metres
    bandwidth : ndarray, shape (n_wave,) or (n_baseline, n_wave), metres: the FWHM of each
        channel, or of each baseline's fringes in each channel
    visphi, visphi_err : ndarray, shape (n_pol, n_baseline, n_wave), radians, or None
        Calibrated referenced phases (phase centre: the science pointing).
    vis2_boot, t3phi_boot, visphi_boot : ndarray, shape (n_boot, ...) or None
        Bootstrap realisations over frames of the same observables.
    """
    vis2: np.ndarray
    vis2_err: np.ndarray
    t3phi: np.ndarray
    t3phi_err: np.ndarray
    uvw: np.ndarray
    wave: np.ndarray
    bandwidth: np.ndarray | None = None
    visphi: np.ndarray | None = None
    visphi_err: np.ndarray | None = None
    vis2_boot: np.ndarray | None = None
    t3phi_boot: np.ndarray | None = None
    visphi_boot: np.ndarray | None = None
    baselines: tuple = BASELINES
    triangles: tuple = TRIANGLES
    boot_kind: str = "frames"             # what the *_boot realisations resample

    def __post_init__(self):
        nw = np.shape(self.wave)[-1]
        nb, nt = len(self.baselines), len(self.triangles)
        for name, shape in [("vis2", (nb, nw)), ("vis2_err", (nb, nw)), ("t3phi", (nt, nw)),
                            ("t3phi_err", (nt, nw))]:
            if np.shape(getattr(self, name))[1:] != shape:
                raise ValueError(f"Observables.{name}: expected shape (pol, {shape[0]}, {nw}), "
                                 f"found {np.shape(getattr(self, name))}")
        if (self.visphi is None) != (self.visphi_err is None):
            raise ValueError("Observables: give both visphi and visphi_err, or neither")
        if self.bandwidth is not None and np.shape(self.bandwidth) not in ((nw,), (nb, nw)):
            raise ValueError(f"Observables.bandwidth: expected ({nw},) or ({nb}, {nw}), "
                             f"found {np.shape(self.bandwidth)}")
        if np.shape(self.uvw)[-2:] != (nb, 3):
            raise ValueError(f"Observables.uvw: expected (..., {nb}, 3), "
                             f"found {np.shape(self.uvw)}")

    @property
    def has_phase(self) -> bool:
        return self.visphi is not None

    @property
    def has_boot(self) -> bool:
        return self.vis2_boot is not None and self.t3phi_boot is not None


@dataclass(frozen=True, eq=False)
class BinaryFitResult:
    """Best binary model of one exposure. Offsets in mas, companion minus primary."""
    dra: float
    ddec: float
    cov: np.ndarray                       # (2, 2) mas^2, reported (larger of fit/bootstrap)
    dra_err: float
    ddec_err: float
    dra_ddec_corr: float
    flux_ratio: float
    flux_ratio_err: float                 # total: statistical and fibre-pointing terms
    flux_ratio_err_stat: float            # statistical only (used by the zero-ratio flag)
    flux_slope: float
    primary_dra: float                    # NaN without calibrated phases
    primary_ddec: float
    primary_dra_err: float
    primary_ddec_err: float
    diameter1: float                      # mas, uniform-disk diameters (fitted or fixed)
    diameter2: float
    diameter1_err: float                  # NaN when fixed
    diameter2_err: float
    sep_pa: SepPA
    ellipse: ErrorEllipse
    chi2: float
    chi2_red: float
    ndata: int
    nfree: int
    flag: int
    runner_up_dra: float
    runner_up_ddec: float
    runner_up_dchi2: float                # raw chi-square difference, NaN if none
    cov_fit: np.ndarray                   # (2, 2) scaled lmfit covariance
    cov_boot: np.ndarray                  # (2, 2) larger bootstrap covariance
    error_source: str                     # estimate reported: "fit", "channels", "frames"...
    bootstrap_kind: str                   # bootstraps run, e.g. "covariance+channels"
    n_boot: int
    grid_dra: np.ndarray                  # (n_x,) mas
    grid_ddec: np.ndarray                 # (n_y,) mas
    chi2_map: np.ndarray                  # (n_y, n_x), flux ratio profiled; NaN outside field
    minima: np.ndarray                    # (n_min, 3): dra, ddec, chi2 of the grid minima
    params_json: str                      # lmfit Parameters of the best fit
    flag_names: tuple = field(default=())


def search_grid(uvw_m, wave_m, *, radius_mas, step_fraction=0.25):
    """Square search grid over a disk, step <= step_fraction * lambda_min / B_max.

    Returns
    -------
    grid_dra, grid_ddec : ndarray, shapes (n_x,), (n_y,), mas
    step_mas : float
    """
    uvw = np.asarray(uvw_m, float)
    bmax = np.max(np.hypot(uvw[..., 0], uvw[..., 1]))
    step = step_fraction * np.min(wave_m) / bmax / (np.pi / 180 / 3600e3)
    n = int(np.ceil(radius_mas / step))
    axis = np.arange(-n, n + 1) * step
    return axis, axis.copy(), float(step)


def _local_minima(chi2_map, n_max):
    from scipy.ndimage import minimum_filter
    filled = np.where(np.isfinite(chi2_map), chi2_map, np.inf)
    is_min = (filled == minimum_filter(filled, size=3, mode="nearest")) & np.isfinite(filled)
    iy, ix = np.nonzero(is_min)
    order = np.argsort(filled[iy, ix])[:n_max]
    return iy[order], ix[order]


def _primary_grid(obs, params, ch, *, step, radius, fibre_fwhm_mas):
    """Primary offset (mas) minimising the referenced-phase chi-square on a grid, the
    companion's relative position and flux ratio held at ``params``.

    V = P1 (c1 E1 + f2 c2 E2 Pd) / (c1 + f2 c2) with P1 the primary's phasor, Pd the
    companion's relative one, c the fibre couplings, E the smearing envelopes; only the
    phase of V enters, so V may be scaled by any positive factor: by E1 (the envelope
    of path difference o = u x1 + v y1), leaving m = c1 + f2 c2 Pd exp(-k (2 o d + d^2))
    with d = u dx + v dy (E = exp(-k o^2)). On the square grid P1 = Px(x1) Py(y1), the
    Gaussian couplings c(x, y) = c(x, 0) c(0, y) and exp(-2 k o d) (linear in o in the
    exponent) are products of per-axis factors."""
    axis = np.arange(-np.ceil(radius / step), np.ceil(radius / step) + 1) * step
    xx, yy = np.meshgrid(axis, axis)
    keep = np.hypot(xx, yy) <= radius
    iy_all, ix_all = np.nonzero(keep)
    x1, y1 = axis[ix_all], axis[iy_all]
    w = np.where(np.isfinite(obs.visphi) & (obs.visphi_err > 0),
                 1 / np.where(obs.visphi_err > 0, obs.visphi_err, 1) ** 2, 0)[..., ch]
    z = (w * np.exp(1j * np.where(w > 0, obs.visphi[..., ch], 0))).sum(0)   # (baseline, wave)
    uvw = np.asarray(obs.uvw, float).reshape(-1, len(obs.baselines), 3).mean(0)
    u, v = uvw[:, 0, None], uvw[:, 1, None]                                  # (baseline, 1)
    wave = np.asarray(obs.wave)[ch]
    bw = None if obs.bandwidth is None else np.asarray(obs.bandwidth)[..., ch]
    p = params.valuesdict()
    dx, dy = p["dra"] * MAS, p["ddec"] * MAS
    f2 = flux_ratio_law(wave, p["flux_ratio"], p["flux_slope"])
    ax = axis * MAS
    px, pyz = axis_phasors(u, v, wave, ax, ax)                              # (axis, bl, wave)
    pyz *= np.conj(z)
    pd = point_phasor(u, v, wave, dx, dy)                                   # (bl, wave)
    if fibre_fwhm_mas is None:
        c1x = c1y = c2x = c2y = np.ones((axis.size, wave.size))
    else:
        fwhm = fibre_fwhm_mas * MAS
        c1x, c1y = (fibre_coupling(ax[:, None], 0.0, wave, fwhm),
                    fibre_coupling(0.0, ax[:, None], wave, fwhm))           # (axis, wave)
        c2x, c2y = (fibre_coupling(ax[:, None] + dx, 0.0, wave, fwhm),
                    fibre_coupling(0.0, ax[:, None] + dy, wave, fwhm))
    c2x = c2x * f2
    # The companion's term per axis: c2 = c2(x) c2(y), exp(-2 k o d) = exp(-2 k u x1 d)
    # exp(-2 k v y1 d) (linear in o), so m - c1 = gx(x1) gy(y1) with pd in gy.
    gx = np.broadcast_to(c2x[:, None, :], px.shape)                         # (axis, bl, wave)
    gy = c2y[:, None, :] * pd
    if bw is not None:
        # smearing_envelope(o) = exp(-k o^2), k = (pi dsigma)^2 / (4 ln 2)
        k = (np.pi * np.asarray(bw) / wave ** 2) ** 2 / (4 * np.log(2)) * np.ones(z.shape)
        d = u * dx + v * dy                                                 # (bl, 1)
        gx = gx * np.exp(-2 * k * d * (u * ax[:, None, None]))
        gy = gy * np.exp(-k * d ** 2 - 2 * k * d * (v * ax[:, None, None]))
    chi2 = np.empty(x1.size)
    chunk = max(1, 30_000 // z.size)
    for s in range(0, x1.size, chunk):
        jx, jy = ix_all[s:s + chunk], iy_all[s:s + chunk]
        m = gx[jx] * gy[jy]                                                 # (pos, bl, wave)
        m += (c1x[jx] * c1y[jy])[:, None]
        num = px[jx] * pyz[jy]
        num *= m
        chi2[s:s + chunk] = -(num.real / np.maximum(np.abs(m), 1e-300)).sum((-1, -2))
    best = int(np.argmin(chi2))
    return float(x1[best]), float(y1[best])


def _distinct(fits, min_dist):
    """Fits sorted by chi-square, dropping any within ``min_dist`` (mas) of a better one."""
    kept = []
    for f in sorted(fits, key=lambda f: f.chisqr):
        x, y = f.params["dra"].value, f.params["ddec"].value
        if all(np.hypot(x - k.params["dra"].value, y - k.params["ddec"].value) > min_dist
               for k in kept):
            kept.append(f)
    return kept


def _params(dra, ddec, ratio, *, radius, ratio_max, fit_slope, has_phase, diameters,
            fit_diameters):
    import lmfit
    p = lmfit.Parameters()
    p.add("dra", value=dra, min=-2 * radius, max=2 * radius)
    p.add("ddec", value=ddec, min=-2 * radius, max=2 * radius)
    p.add("flux_ratio", value=max(ratio, 1e-4), min=0.0, max=2 * ratio_max)
    p.add("flux_slope", value=0.0, vary=fit_slope, min=-10, max=10)
    p.add("primary_dra", value=0.0, vary=has_phase, min=-radius, max=radius)
    p.add("primary_ddec", value=0.0, vary=has_phase, min=-radius, max=radius)
    for k in (0, 1):
        p.add(f"diameter{k + 1}", value=float(diameters[k]), vary=bool(fit_diameters[k]),
              min=0.0, max=max(100.0, 2 * float(diameters[k])))
    return p


def _refine(residual, start):
    import lmfit
    return lmfit.minimize(residual, start, method="leastsq", scale_covar=False, nan_policy="raise",
                          Dfun=getattr(residual, "jacobian", None))


@dataclass(frozen=True, eq=False)
class RefinedFit:
    """What the global search, the lmfit refinement and the bootstraps of one exposure
    give (:func:`refine_binary`). The reported errors and the flags follow from it and a
    few thresholds (:func:`summarise_fit`), so a change of those needs no refit; its
    fields are arrays, numbers and strings (:meth:`to_arrays`), so it can be kept."""
    search: "GridSearch"                  # the global search it started from
    minima: np.ndarray                    # (n_min, 3): dra, ddec, chi2 of the grid minima
    candidates: np.ndarray                # (n_fit, 3): dra, ddec, chi2 of the distinct
                                          # refined minima, best first
    params_json: str                      # lmfit Parameters of the best fit
    covar: np.ndarray                     # (n_var, n_var) unscaled lmfit covariance; (0, 0)
                                          # when lmfit gave none
    var_names: tuple                      # the varied parameters, in ``covar``'s order
    ndata: int
    nfree: int
    has_phase: bool
    boots: dict                           # kind -> (n, 7) refitted values of BOOT_NAMES

    def to_arrays(self) -> dict:
        """Every field as a numpy array (``search`` as ``search:<field>``, ``boots`` as
        ``boot:<kind>``)."""
        out = {k: np.asarray(getattr(self, k)) for k in
               ("minima", "candidates", "params_json", "covar", "ndata", "nfree", "has_phase")}
        out["var_names"] = np.array(self.var_names, dtype=str)
        out.update({f"search:{k}": v for k, v in self.search.to_arrays().items()})
        out.update({f"boot:{k}": np.asarray(v) for k, v in self.boots.items()})
        return out

    @classmethod
    def from_arrays(cls, arrays) -> "RefinedFit":
        """Inverse of :meth:`to_arrays` (any mapping of name -> array)."""
        a = {k: np.asarray(arrays[k]) for k in arrays}

        def prefixed(prefix):
            return {k[len(prefix):]: v for k, v in a.items() if k.startswith(prefix)}
        return cls(search=GridSearch.from_arrays(prefixed("search:")), minima=a["minima"],
                   candidates=a["candidates"], params_json=str(a["params_json"]),
                   covar=a["covar"], var_names=tuple(str(v) for v in a["var_names"]),
                   ndata=int(a["ndata"]), nfree=int(a["nfree"]), has_phase=bool(a["has_phase"]),
                   boots=prefixed("boot:"))


BOOT_NAMES = ("dra", "ddec", "flux_ratio", "primary_dra", "primary_ddec", "diameter1",
              "diameter2")
"""Parameters kept from every bootstrap refit, in the columns of ``RefinedFit.boots``."""


def fit_binary(obs: Observables, *, fibre_fwhm_mas: float | None, search_radius_mas: float,
               step_fraction: float = 0.25, flux_ratios=None, flux_ratio_max: float = 1.5,
               fit_slope: bool = False, diameters_mas=(0.0, 0.0), fit_diameters=(False, False),
               pointing_sigma_mas: float = 0.0, n_start: int = 5,
               n_boot: int = 50, search_max_channels: int = 32, ambiguous_dchi2: float = 10.0,
               chi2_red_range=(0.25, 5.0), bootstrap: Literal["auto", "channels", "none"] = "auto",
               seed: int = 0) -> BinaryFitResult:
    """Fit a binary to one exposure's observables.

    :func:`refine_binary` (search, refinement, bootstraps) followed by
    :func:`summarise_fit` (reported errors, flags).

    Parameters
    ----------
    obs : Observables
    fibre_fwhm_mas : float or None, fibre acceptance FWHM at 2.2 um, mas (None: none)
    search_radius_mas : float, radius of the global search about the primary, mas
    step_fraction : float, grid step in units of lambda_min / B_max (<= 0.25)
    flux_ratios : array_like or None, trial flux ratios of the search
        (default 16 values log-spaced from 1e-3 to ``flux_ratio_max``)
    flux_ratio_max : float, largest flux ratio searched (> 1 lets the search see the
        mirror solution of near-equal binaries)
    fit_slope : bool, fit the flux ratio's spectral index
    diameters_mas : (float, float), uniform-disk diameters of primary, companion, mas
        (fixed values, or starting values of the refinement; the grid search treats
        both stars as points)
    fit_diameters : (bool, bool), fit the primary's / the companion's diameter
    pointing_sigma_mas : float, 1-sigma uncertainty (per axis, mas) of where the pair sits
        in the fibre (the science pointing; with referenced phases, the calibrators'
        pointing), propagated into ``flux_ratio_err`` through the fibre attenuation
    n_start : int, number of grid minima refined
    n_boot : int, bootstrap realisations (0: none)
    search_max_channels : int, channels (evenly spread) used by the grid search
    ambiguous_dchi2, chi2_red_range : flag thresholds (see module docstring)
    bootstrap : "auto" (the supplied realisations, if any, and a channel resampling),
        "channels" (channel resampling only) or "none"
    seed : int, seed of the channel resampling

    Returns
    -------
    BinaryFitResult

    Raises
    ------
    FitFailed
        Fewer valid data points than free parameters.
    """
    refined = refine_binary(obs, fibre_fwhm_mas=fibre_fwhm_mas,
                            search_radius_mas=search_radius_mas, step_fraction=step_fraction,
                            flux_ratios=flux_ratios, flux_ratio_max=flux_ratio_max,
                            fit_slope=fit_slope, diameters_mas=diameters_mas,
                            fit_diameters=fit_diameters, n_start=n_start, n_boot=n_boot,
                            search_max_channels=search_max_channels, bootstrap=bootstrap,
                            seed=seed)
    return summarise_fit(refined, fibre_fwhm_mas=fibre_fwhm_mas,
                         search_radius_mas=search_radius_mas,
                         pointing_sigma_mas=pointing_sigma_mas,
                         ambiguous_dchi2=ambiguous_dchi2, chi2_red_range=chi2_red_range)


@dataclass(frozen=True, eq=False)
class GridSearch:
    """Chi-square of the global search over the fibre's field (:func:`grid_search`)."""
    grid_dra: np.ndarray                  # (n_x,) mas
    grid_ddec: np.ndarray                 # (n_y,) mas
    step: float                           # mas
    chi2_map: np.ndarray                  # (n_y, n_x), flux ratio profiled; NaN outside field
    ratio_map: np.ndarray                 # (n_y, n_x), the flux ratio of chi2_map

    def to_arrays(self) -> dict:
        return {k: np.asarray(getattr(self, k)) for k in
                ("grid_dra", "grid_ddec", "step", "chi2_map", "ratio_map")}

    @classmethod
    def from_arrays(cls, arrays) -> "GridSearch":
        a = {k: np.asarray(arrays[k]) for k in arrays}
        return cls(grid_dra=a["grid_dra"], grid_ddec=a["grid_ddec"], step=float(a["step"]),
                   chi2_map=a["chi2_map"], ratio_map=a["ratio_map"])


SEARCH_FIELDS = ("vis2", "vis2_err", "t3phi", "t3phi_err", "uvw", "wave", "bandwidth",
                 "baselines", "triangles")
"""The :class:`Observables` fields :func:`grid_search` reads."""


def _search_channels(n_wave: int, max_channels: int) -> np.ndarray:
    return np.unique(np.linspace(0, n_wave - 1, min(n_wave, max_channels)).round().astype(int))


def grid_search(obs: Observables, *, fibre_fwhm_mas: float | None, search_radius_mas: float,
                step_fraction: float = 0.25, flux_ratios=None, flux_ratio_max: float = 1.5,
                diameters_mas=(0.0, 0.0), fit_diameters=(False, False),
                search_max_channels: int = 32) -> GridSearch:
    """Global chi-square search of :func:`fit_binary` (same parameters; reads only the
    fields ``SEARCH_FIELDS`` of ``obs``): V2 and closure phases of ``search_max_channels``
    channels on a square grid over the disk of ``search_radius_mas``, the flux ratio
    profiled over ``flux_ratios``."""
    if not 0 < step_fraction <= 0.25:
        raise ValueError(f"step_fraction must be in (0, 0.25], found {step_fraction}")
    ratios = (np.geomspace(1e-3, flux_ratio_max, 16) if flux_ratios is None
              else np.asarray(flux_ratios, float))
    uvw_mean = np.asarray(obs.uvw, float).reshape(-1, len(obs.baselines), 3).mean(0)
    gx, gy, step = search_grid(obs.uvw, obs.wave, radius_mas=search_radius_mas,
                               step_fraction=step_fraction)
    xx, yy = np.meshgrid(gx, gy)
    inside = np.hypot(xx, yy) <= search_radius_mas
    ch = _search_channels(len(obs.wave), search_max_channels)
    bw = None if obs.bandwidth is None else np.asarray(obs.bandwidth)[..., ch]
    # With diameters to fit, the grid uses closure phases only: a resolved star's V2 loss,
    # unknown yet, would otherwise pull the search towards a bright close companion.
    e2 = obs.vis2_err[..., ch] * (np.nan if any(fit_diameters) else 1.0)
    c2 = grid_chi2(obs.vis2[..., ch], e2, obs.t3phi[..., ch],
                   obs.t3phi_err[..., ch], uvw_mean, np.asarray(obs.wave)[ch],
                   dra_mas=xx[inside], ddec_mas=yy[inside], flux_ratios=ratios, bandwidth_m=bw,
                   fibre_fwhm_mas=fibre_fwhm_mas, diameters_mas=diameters_mas,
                   baselines=obs.baselines, triangles=obs.triangles)
    chi2_map = np.full(xx.shape, np.nan)
    chi2_map[inside] = c2.min(1)
    ratio_map = np.full(xx.shape, np.nan)
    ratio_map[inside] = ratios[c2.argmin(1)]
    return GridSearch(grid_dra=gx, grid_ddec=gy, step=step, chi2_map=chi2_map,
                      ratio_map=ratio_map)


def refine_binary(obs: Observables, *, fibre_fwhm_mas: float | None, search_radius_mas: float,
                  step_fraction: float = 0.25, flux_ratios=None, flux_ratio_max: float = 1.5,
                  fit_slope: bool = False, diameters_mas=(0.0, 0.0),
                  fit_diameters=(False, False), n_start: int = 5, n_boot: int = 50,
                  search_max_channels: int = 32,
                  bootstrap: Literal["auto", "channels", "none"] = "auto",
                  seed: int = 0, search: "GridSearch | None" = None) -> RefinedFit:
    """The costly part of :func:`fit_binary` (same parameters): the global search, the
    lmfit refinement of its best minima and the bootstrap refits. ``search``: the
    :func:`grid_search` of ``obs`` with these parameters, if already done."""
    from pipeline.errors import FitFailed
    if bootstrap not in ("auto", "channels", "none"):
        raise ValueError(f"bootstrap must be 'auto', 'channels' or 'none', found {bootstrap!r}")
    if search is None:
        search = grid_search(obs, fibre_fwhm_mas=fibre_fwhm_mas,
                             search_radius_mas=search_radius_mas, step_fraction=step_fraction,
                             flux_ratios=flux_ratios, flux_ratio_max=flux_ratio_max,
                             diameters_mas=diameters_mas, fit_diameters=fit_diameters,
                             search_max_channels=search_max_channels)
    gx, gy, step = search.grid_dra, search.grid_ddec, search.step
    chi2_map, ratio_map = search.chi2_map, search.ratio_map
    nw = len(obs.wave)
    ch = _search_channels(nw, search_max_channels)
    iy, ix = _local_minima(chi2_map, n_start)
    minima = np.column_stack([gx[ix], gy[iy], chi2_map[iy, ix]])

    kw = dict(radius=search_radius_mas, ratio_max=flux_ratio_max, fit_slope=fit_slope,
              diameters=diameters_mas, fit_diameters=fit_diameters)
    rkw = dict(fibre_fwhm_mas=fibre_fwhm_mas, vis2=obs.vis2, t3phi=obs.t3phi, weight=np.ones(nw))
    residual, ndata = make_residual(obs, visphi=obs.visphi, **rkw)
    nfree = 3 + int(fit_slope) + 2 * int(obs.has_phase) + int(sum(map(bool, fit_diameters)))
    if ndata <= nfree:
        raise FitFailed("binary fit", n_points=ndata, n_free=nfree)
    # Stage 1: V2 and closure phases only (blind to the primary's offset but for the
    # fibre and smearing envelopes), primary at the phase centre.
    res_amp, _ = make_residual(obs, visphi=None, **rkw)
    fits = [_refine(res_amp, _params(gx[x], gy[y], ratio_map[y, x], has_phase=False, **kw))
            for y, x in zip(iy, ix)]
    fits = _distinct(fits, 2 * step)
    if obs.has_phase:
        # Stage 2: the primary's offset from a grid of referenced-phase chi-square (the
        # phases wrap within a few mas), then every parameter refined on all data.
        starts = []
        for f in fits:
            p = _params(f.params["dra"].value, f.params["ddec"].value,
                        f.params["flux_ratio"].value, has_phase=True, **kw)
            for name in ("flux_slope", "diameter1", "diameter2"):
                p[name].value = f.params[name].value
            x1, y1 = _primary_grid(obs, f.params, ch, step=step, radius=search_radius_mas,
                                   fibre_fwhm_mas=fibre_fwhm_mas)
            p["primary_dra"].value, p["primary_ddec"].value = x1, y1
            starts.append(p)
        fits = [_refine(residual, p) for p in starts]
    fits.sort(key=lambda f: f.chisqr)
    best = fits[0]
    boots = _bootstrap(obs, refit_kw=dict(fibre_fwhm_mas=fibre_fwhm_mas, max_step_mas=step),
                       start=best.params, n_boot=n_boot, mode=bootstrap, seed=seed,
                       names=list(BOOT_NAMES))
    candidates = np.array([[f.params["dra"].value, f.params["ddec"].value, f.chisqr]
                           for f in fits], float)
    return RefinedFit(search=search, minima=minima, candidates=candidates, params_json=params_to_json(best.params),
                      covar=(np.zeros((0, 0)) if best.covar is None
                             else np.asarray(best.covar, float)),
                      var_names=tuple(best.var_names), ndata=int(ndata), nfree=int(nfree),
                      has_phase=obs.has_phase, boots=boots)


def summarise_fit(refined: RefinedFit, *, fibre_fwhm_mas: float | None,
                  search_radius_mas: float, pointing_sigma_mas: float = 0.0,
                  ambiguous_dchi2: float = 10.0,
                  chi2_red_range=(0.25, 5.0)) -> BinaryFitResult:
    """Reported errors and flags of a :class:`RefinedFit` (parameters as in
    :func:`fit_binary`; ``fibre_fwhm_mas`` and ``search_radius_mas`` as it was refined
    with)."""
    bp = params_from_json(refined.params_json)
    search = refined.search
    step = search.step
    chi2 = float(refined.candidates[0, 2])
    ndata, nfree, has_phase = refined.ndata, refined.nfree, refined.has_phase
    chi2_red = chi2 / (ndata - nfree)
    scale = max(1.0, chi2_red)

    # Runner-up: best refined minimum at least half a fringe spacing from the best one.
    min_dist = 2 * step
    best_xy = refined.candidates[0, :2]
    runner = next((c for c in refined.candidates[1:] if np.hypot(*(c[:2] - best_xy)) > min_dist),
                  None)

    names = list(BOOT_NAMES)
    cov_fit_full = np.full((7, 7), np.nan)
    if refined.covar.size:
        var = list(refined.var_names)
        idx = [var.index(n) if n in var else None for n in names]
        for a, ia in enumerate(idx):
            for b, ib in enumerate(idx):
                if ia is not None and ib is not None:
                    cov_fit_full[a, b] = refined.covar[ia, ib] * scale

    boots = refined.boots
    estimates = {"fit": cov_fit_full}
    estimates.update({k: np.cov(v, rowvar=False) for k, v in boots.items() if len(v) > 2})
    source, cov_full = _largest(estimates, slice(0, 2))
    cov = cov_full[:2, :2]
    boot_src, cov_boot_full = (_largest({k: v for k, v in estimates.items() if k != "fit"},
                                        slice(0, 2)) if len(estimates) > 1
                               else ("none", np.full((7, 7), np.nan)))
    pos_fit, pos_boot = cov_fit_full[:2, :2], cov_boot_full[:2, :2]
    prim = _largest(estimates, slice(3, 5))[1][3:5, 3:5]
    with warnings.catch_warnings():           # every other error: the largest estimate
        warnings.simplefilter("ignore", RuntimeWarning)      # all-NaN: fixed parameters
        other = np.sqrt(np.nanmax([np.diag(c) for c in estimates.values()], axis=0))
    err = np.concatenate([np.sqrt(np.diag(cov)), other[2:3], np.sqrt(np.diag(prim)), other[5:]])
    ratio_err = float(err[2])
    # The on-sky ratio divides out the fibre attenuation of both stars: a common shift
    # delta of the pair in the fibre changes ln(c1 / c2) by 8 ln2 (d . delta) / FWHM^2.
    dra, ddec, ratio = bp["dra"].value, bp["ddec"].value, bp["flux_ratio"].value
    if fibre_fwhm_mas and pointing_sigma_mas > 0:
        rel = 8 * np.log(2) * np.hypot(dra, ddec) * pointing_sigma_mas / fibre_fwhm_mas ** 2
        ratio_err_total = float(np.hypot(ratio_err, ratio * rel))
    else:
        ratio_err_total = ratio_err

    flag = 0
    dchi2 = float(runner[2] - chi2) if runner is not None else np.nan
    if runner is not None and dchi2 / scale < ambiguous_dchi2:
        flag |= FLAGS["ambiguous"]
    if np.hypot(dra, ddec) > search_radius_mas - step:
        flag |= FLAGS["field_edge"]
    if not ratio > 3 * ratio_err:
        flag |= FLAGS["flux_ratio_zero"]
    if not chi2_red_range[0] <= chi2_red <= chi2_red_range[1]:
        flag |= FLAGS["chi2_red"]
    if not np.all(np.isfinite(pos_fit)):
        flag |= FLAGS["no_covariance"]
    nan = float("nan")
    fitted = [bp[f"diameter{k}"].vary for k in (1, 2)]
    return BinaryFitResult(
        dra=float(dra), ddec=float(ddec), cov=cov, dra_err=float(err[0]), ddec_err=float(err[1]),
        dra_ddec_corr=correlation(cov), flux_ratio=float(ratio),
        flux_ratio_err=ratio_err_total, flux_ratio_err_stat=ratio_err,
        flux_slope=float(bp["flux_slope"].value),
        primary_dra=float(bp["primary_dra"].value) if has_phase else nan,
        primary_ddec=float(bp["primary_ddec"].value) if has_phase else nan,
        primary_dra_err=float(err[3]) if has_phase else nan,
        primary_ddec_err=float(err[4]) if has_phase else nan,
        diameter1=float(bp["diameter1"].value), diameter2=float(bp["diameter2"].value),
        diameter1_err=float(err[5]) if fitted[0] else nan,
        diameter2_err=float(err[6]) if fitted[1] else nan,
        sep_pa=sep_pa(dra, ddec, cov), ellipse=error_ellipse(cov), chi2=chi2, chi2_red=chi2_red,
        ndata=ndata, nfree=nfree, flag=flag,
        runner_up_dra=float(runner[0]) if runner is not None else nan,
        runner_up_ddec=float(runner[1]) if runner is not None else nan,
        runner_up_dchi2=dchi2, cov_fit=pos_fit, cov_boot=pos_boot,
        error_source=source, bootstrap_kind="+".join(boots) or "none",
        n_boot=max((len(v) for v in boots.values()), default=0),
        grid_dra=search.grid_dra, grid_ddec=search.grid_ddec,
        chi2_map=search.chi2_map, minima=refined.minima,
        params_json=refined.params_json,
        flag_names=tuple(k for k, b in FLAGS.items() if flag & b))


def _largest(estimates, block):
    """(name, covariance) of the estimate with the largest finite trace over ``block``
    (the first estimate when none is finite)."""
    items = list(estimates.items())
    finite = [(np.trace(c[block, block]), k, c) for k, c in items
              if np.all(np.isfinite(c[block, block]))]
    if not finite:
        return items[0]
    _, name, cov = max(finite, key=lambda t: t[0])
    return name, cov


def _bootstrap(obs, *, refit_kw, start, n_boot, mode, seed, names):
    """Refits of bootstrap realisations from the best fit: {kind: samples (n, n_names)}.

    "auto": the supplied realisations (``obs.boot_kind``) when present, and always a
    resampling of spectral channels (which also sees errors correlated between
    channels that the quoted errors miss). All realisations of a kind are refitted
    together (:func:`refit_batch`)."""
    if n_boot <= 0 or mode == "none":
        return {}
    nw = len(obs.wave)
    columns = [PARAM_NAMES.index(n) for n in names]
    out = {}
    if obs.has_boot and mode == "auto":
        n = min(n_boot, len(obs.vis2_boot))
        visphi = None
        if obs.visphi is not None:
            visphi = (obs.visphi_boot[:n] if obs.visphi_boot is not None
                      else np.broadcast_to(obs.visphi, (n,) + np.shape(obs.visphi)))
        values, _, _ = refit_batch(obs, start, vis2=obs.vis2_boot[:n], t3phi=obs.t3phi_boot[:n],
                                visphi=visphi, **refit_kw)
        out[obs.boot_kind] = values[:, columns]
    rng = np.random.default_rng(seed)
    weight = np.array([np.bincount(rng.integers(0, nw, nw), minlength=nw)
                       for _ in range(n_boot)], float)

    def repeat(x):
        return None if x is None else np.broadcast_to(x, (n_boot,) + np.shape(x))
    values, _, _ = refit_batch(obs, start, vis2=repeat(obs.vis2), t3phi=repeat(obs.t3phi),
                            visphi=repeat(obs.visphi), weight=weight, **refit_kw)
    out["channels"] = values[:, columns]
    return out


def refit_batch(obs: Observables, start, *, fibre_fwhm_mas: float | None, vis2, t3phi,
                visphi=None, weight=None, max_step_mas: float | None = None,
                max_iter: int = 300, ftol: float = 1.5e-8):
    """Levenberg-Marquardt refits of many realisations at once, from one start.

    The least-squares problem of :func:`pipeline.numerics.binary_model.make_residual`
    (the one ``fit_binary`` gives lmfit) for every realisation, vectorised over the
    realisations still iterating: one forward model with its analytic Jacobian
    (``binary_model.binary_observables_batch``) per iteration for all of them
    together. Each step solves the damped normal equations
    (J^T J + lambda diag(J^T J)) delta = -J^T r (Marquardt 1963, J. SIAM 11, 431);
    lambda follows the gain ratio of each step (Nielsen 1999, IMM-REP-1999-05).
    Parameters are clipped to ``start``'s bounds, and a step that would move a position
    (companion or primary) by more than ``max_step_mas`` is shortened to it: where the
    position is barely constrained (flux ratio near zero) an undamped step could jump
    to another fringe's minimum, which a refit from the best fit must not. A
    realisation stops when the
    undamped (Gauss-Newton) step would lower its chi-square by less than ``ftol``
    times it (1.5e-8, lmfit's MINPACK default), or when lambda exceeds 1e12.

    Parameters
    ----------
    obs : Observables (errors, (u, v, w), wavelengths, bandwidths, baselines, triangles)
    start : lmfit Parameters (values, which vary, bounds)
    fibre_fwhm_mas : float or None
    vis2 : ndarray, shape (n_real, n_pol, n_baseline, n_wave)
    t3phi : ndarray, shape (n_real, n_pol, n_triangle, n_wave), radians
    visphi : ndarray, shape (n_real, n_pol, n_baseline, n_wave), radians, or None (not fitted)
    weight : ndarray, shape (n_real, n_wave), or None: each channel's multiplicity
        (its squared residual is multiplied by it)
    max_step_mas : float or None, longest move of a position per iteration, mas
        (``fit_binary`` gives its grid step, a quarter of the smallest fringe spacing)
    max_iter, ftol : iteration limit and relative convergence threshold

    Returns
    -------
    values : ndarray, shape (n_real, len(PARAM_NAMES)), every parameter (fixed ones
        at their start values), in the order of ``binary_model.PARAM_NAMES``
    chi2 : ndarray, shape (n_real,)
    n_iter : ndarray, shape (n_real,), iterations made
    """
    vis2, t3phi = np.asarray(vis2, float), np.asarray(t3phi, float)
    n_real, nw = vis2.shape[0], len(obs.wave)
    sw = np.sqrt(np.ones((n_real, nw)) if weight is None else np.asarray(weight, float))
    parts = [(vis2, obs.vis2_err, False), (t3phi, obs.t3phi_err, True)]
    if visphi is not None:
        parts.append((np.asarray(visphi, float), obs.visphi_err, True))
    # Per part (real, pol, row, wave): data, invalid points zeroed, and sqrt(weight) / error,
    # zero where invalid (so invalid points add nothing, as make_residual drops them).
    data, scale, is_phase = [], [], []
    for d, e, phase in parts:
        e = np.asarray(e, float)
        ok = np.isfinite(d) & np.isfinite(e) & (e > 0)
        data.append(np.where(ok, d, 0.0))
        scale.append(np.where(ok, sw[:, None, None, :] / np.where(ok, e, 1.0), 0.0))
        is_phase.append(phase)
    free = [k for k, name in enumerate(PARAM_NAMES) if start[name].vary]
    nf = len(free)
    values0 = np.array([start[name].value for name in PARAM_NAMES], float)
    lo = np.array([start[PARAM_NAMES[k]].min for k in free], float)
    hi = np.array([start[PARAM_NAMES[k]].max for k in free], float)
    model_kw = dict(bandwidth_m=obs.bandwidth, fibre_fwhm_mas=fibre_fwhm_mas,
                    baselines=obs.baselines, triangles=obs.triangles)

    free_names = [PARAM_NAMES[k] for k in free]
    is_position = np.array([n in ("dra", "ddec", "primary_dra", "primary_ddec")
                            for n in free_names])

    def model(x, derivatives=()):
        """Model observables (set, row, wave) of free-parameter sets x (set, free), and
        with ``derivatives`` their analytic derivatives (set, free, row, wave)."""
        full = np.broadcast_to(values0, (len(x),) + values0.shape).copy()
        full[:, free] = x
        out = binary_observables_batch(obs.uvw, obs.wave, dict(zip(PARAM_NAMES, full.T)),
                                       derivatives=derivatives, **model_kw)
        return out[:len(parts)], out[3:3 + len(parts)]

    def normal_equations(x, idx):
        """chi-square (set,), J^T J (set, free, free) and J^T r (set, free) at x, from the
        residuals r (set, point) and the Jacobian J (set, free, point); only these small
        products are kept between iterations."""
        m, dm = model(x, free_names)
        r = [(wrap(d[idx] - mk[:, None]) if ph else d[idx] - mk[:, None]) * s[idx]
             for d, s, mk, ph in zip(data, scale, m, is_phase)]
        jac = [-dk[:, :, None] * s[idx][:, None] for dk, s in zip(dm, scale)]
        r = np.concatenate([rk.reshape(len(idx), -1) for rk in r], axis=1)
        jac = np.concatenate([jk.reshape(len(idx), nf, -1) for jk in jac], axis=2)
        return (np.einsum("ij,ij->i", r, r), jac @ jac.transpose(0, 2, 1),
                (jac @ r[:, :, None])[..., 0])

    everyone = np.arange(n_real)
    x = np.broadcast_to(values0[free], (n_real, nf)).copy()
    chi2, jtj_at, grad_at = normal_equations(x, everyone)
    lam, nu = np.full(n_real, 1e-3), np.full(n_real, 2.0)
    n_iter = np.zeros(n_real, int)
    active = everyone
    for _ in range(max_iter):
        jtj, grad = jtj_at[active], grad_at[active]
        diag = np.maximum(np.einsum("ikk->ik", jtj), 1e-300)[:, :, None] * np.eye(nf)
        gauss_newton = np.linalg.solve(jtj + 1e-12 * diag, grad[..., None])[..., 0]
        # Converged: the undamped step would lower chi-square by less than ftol of it.
        going = ((np.einsum("ik,ik->i", grad, gauss_newton) >= ftol * chi2[active])
                 & (lam[active] < 1e12))
        active, jtj, grad, diag = active[going], jtj[going], grad[going], diag[going]
        if not active.size:
            break
        n_iter[active] += 1
        step = np.linalg.solve(jtj + lam[active, None, None] * diag, grad[..., None])[..., 0]
        if max_step_mas is not None and is_position.any():
            longest = np.abs(step[:, is_position]).max(1)
            step = step * np.minimum(1.0, max_step_mas / np.maximum(longest, 1e-300))[:, None]
        x_new = np.clip(x[active] - step, lo, hi)
        chi2_new, jtj_new, grad_new = normal_equations(x_new, active)
        better = chi2_new < chi2[active]
        # Gain ratio: actual over predicted decrease of the linearised model.
        predicted = np.einsum("ik,ik->i", step, grad + lam[active, None]
                              * np.einsum("ikk->ik", diag) * step)
        gain = (chi2[active] - chi2_new) / np.maximum(predicted, 1e-300)
        took = active[better]
        x[took], chi2[took] = x_new[better], chi2_new[better]
        jtj_at[took], grad_at[took] = jtj_new[better], grad_new[better]
        lam[active] = np.where(better, lam[active] * np.maximum(1 / 3, 1 - (2 * gain - 1) ** 3),
                               lam[active] * nu[active])
        nu[active] = np.where(better, 2.0, 2 * nu[active])
    full = np.broadcast_to(values0, (n_real,) + values0.shape).copy()
    full[:, free] = x
    return full, chi2, n_iter


def params_to_json(params) -> str:
    """lmfit Parameters as compact JSON: {name: {value, stderr, vary, min, max}}."""
    def num(x):
        return None if x is None or not np.isfinite(x) else float(x)
    return json.dumps({n: {"value": num(p.value), "stderr": num(p.stderr), "vary": bool(p.vary),
                           "min": num(p.min), "max": num(p.max)} for n, p in params.items()})


def params_from_json(text: str):
    """lmfit Parameters rebuilt from :func:`params_to_json` (e.g. from a product's provenance)."""
    import lmfit
    out = lmfit.Parameters()
    for name, d in json.loads(text).items():
        out.add(name, value=d["value"], vary=d["vary"],
                min=-np.inf if d["min"] is None else d["min"],
                max=np.inf if d["max"] is None else d["max"])
        out[name].stderr = d["stderr"]
    return out
