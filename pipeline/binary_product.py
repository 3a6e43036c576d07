# SPDX-License-Identifier: BSD-3-Clause
"""Stage glue of ``binary``: a ``calibrate`` product in, the ``binary`` product out.

Reads the calibrated observables of one science exposure (any mapping-like view
with ``view["name"]``, ``name in view`` and ``view.attrs``), builds
:class:`pipeline.numerics.binary_fit.Observables`, fits, and returns the outputs
the store writes: the best fit as attributes (``lmfit_params`` holds the lmfit
Parameters as JSON), the chi-square map of the global search, and the data with
the best model (for the report).

With a ``cache_dir``, the costly part of the fit (search, refinement, bootstraps:
``refine_binary``) is kept there by a digest of everything it depends on: the
observables, bootstrap realisations included, the parameters it takes, the source
of the fitting code and the versions of numpy, scipy and lmfit. A change of a
parameter that only enters the reported errors and flags (``pointing_sigma_mas``,
``ambiguous_dchi2``, ``chi2_red_range``) then re-summarises the kept fit, which is
exactly what a refit would give. The global search (``grid_search``) is kept on its
own, by the observables and parameters it reads, so a change of a parameter of the
refinement or of the bootstraps (``n_start``, ``n_boot``, ``fit_slope``, ``use_phases``)
reuses it.
"""

from __future__ import annotations

import functools
import json

import numpy as np

from . import skymodel
from .digest import ArrayCache, content_digest, source_digest
from .errors import BadInput, FitFailed
from .numerics import binary_fit, binary_model
from .numerics.binary_fit import (FLAGS, SEARCH_FIELDS, BinaryFitResult, GridSearch,
                                  Observables, RefinedFit, grid_search, refine_binary,
                                  summarise_fit)
from .numerics.binary_model import binary_observables
from .numerics.correlated_draws import draw_correlated
from .numerics.ellipse import ErrorEllipse, SepPA
from .stage import Array

__all__ = ["observables_from_product", "binary_product", "refined_fit", "to_jsonable",
           "FLAG_DOC", "SUMMARY_KEYWORDS", "SEARCH_KEYWORDS"]

FLAG_DOC = ", ".join(f"{b}={name}" for name, b in FLAGS.items())


def observables_from_product(view, *, use_phases: bool = True, n_draw: int = 0,
                             seed: int = 0) -> Observables:
    """Observables of a ``calibrate`` (or ``average``) product.

    ``band`` (or ``bandwidth``) gives each channel's FWHM; without it the channel
    spacing is used. ``band_baseline`` (pol, baseline, wave), when present, gives each
    baseline's own (its traces' line-spread and the resampling) and is used instead.
    With ``n_draw > 0`` and a ``vis2_cov`` dataset, ``n_draw``
    realisations are drawn from the frame-bootstrap covariances between channels
    (``vis2_cov``, ``t3phi_cov``, ``visphi_cov``; independent channels where absent)
    for the bootstrap of the fit.
    """
    path = getattr(view, "path", "?")
    try:
        wave = np.asarray(view["wave"], float)
        vis2, vis2_err = np.asarray(view["vis2"], float), np.asarray(view["vis2_err"], float)
        t3, t3e = np.asarray(view["t3phi"], float), np.asarray(view["t3phi_err"], float)
        uvw = np.asarray(view["uvw"], float)
    except KeyError as exc:
        raise BadInput(path, f"calibrated product lacks {exc}") from None
    n_ok = [int((np.isfinite(x) & np.isfinite(e) & (e > 0)).sum())
            for x, e in ((vis2, vis2_err), (t3, t3e))]
    if sum(n_ok) < 4:
        raise BadInput(path, f"only {n_ok[0]} usable V2 and {n_ok[1]} closure-phase points "
                             f"(of {vis2.size} and {t3.size}): values or errors are NaN or "
                             "errors <= 0 (too few valid frames for a bootstrap upstream?)")
    band = next((np.asarray(view[k], float) for k in ("band", "bandwidth") if k in view), None)
    if band is None or band.shape != wave.shape:
        band = np.abs(np.gradient(wave))
    if "band_baseline" in view:      # per baseline (pol, baseline, wave): mean over pol
        per_baseline = np.nanmean(np.asarray(view["band_baseline"], float), axis=0)
        if per_baseline.shape[-1] == wave.size and np.all(np.isfinite(per_baseline)):
            band = per_baseline
    vp = vpe = None
    if use_phases and "visphi" in view and "visphi_err" in view:
        vp, vpe = np.asarray(view["visphi"], float), np.asarray(view["visphi_err"], float)
        if not np.any(np.isfinite(vp) & np.isfinite(vpe) & (vpe > 0)):
            vp = vpe = None
    boots = {}
    if n_draw > 0 and "vis2_cov" in view:
        boots["vis2_boot"] = draw_correlated(vis2, vis2_err, view["vis2_cov"], n=n_draw, seed=seed)
        boots["t3phi_boot"] = draw_correlated(t3, t3e, view["t3phi_cov"] if "t3phi_cov" in view
                                              else None, n=n_draw, seed=seed + 1)
        if vp is not None:
            cov = view["visphi_cov"] if "visphi_cov" in view else None
            boots["visphi_boot"] = draw_correlated(vp, vpe, cov, n=n_draw, seed=seed + 2)
    try:
        return Observables(vis2=vis2, vis2_err=vis2_err, t3phi=t3, t3phi_err=t3e, uvw=uvw,
                           wave=wave, bandwidth=band, visphi=vp, visphi_err=vpe,
                           boot_kind="covariance", **boots)
    except ValueError as exc:
        raise BadInput(path, str(exc)) from None


SUMMARY_KEYWORDS = ("ambiguous_dchi2", "chi2_red_range")
"""Keywords of ``fit_kw`` that enter the summary only (``summarise_fit``), not the fit."""


@functools.lru_cache(maxsize=None)
def _code_versions() -> tuple:
    """The fitting code's source digest and library versions, read once per process."""
    import lmfit
    import scipy
    return (source_digest(binary_fit, binary_model, skymodel), np.__version__,
            scipy.__version__, lmfit.__version__)


SEARCH_KEYWORDS = ("fibre_fwhm_mas", "search_radius_mas", "step_fraction", "flux_ratios",
                   "flux_ratio_max", "diameters_mas", "fit_diameters", "search_max_channels")
"""Keywords of ``refine_binary`` that ``grid_search`` takes."""


def refined_fit(obs: Observables, *, cache_dir=None, **refine_kw) -> RefinedFit:
    """``refine_binary(obs, **refine_kw)``, kept in (and taken from) ``cache_dir``; its
    global search is kept on its own too (by the fields and parameters it reads), so a
    change of a parameter of the refinement or the bootstraps only reruns those."""
    if cache_dir is None:
        return refine_binary(obs, **refine_kw)
    cache, code = ArrayCache(cache_dir), _code_versions()
    fields = {k: v for k, v in vars(obs).items() if v is not None}
    key = content_digest("refine_binary", fields, refine_kw, code)
    kept = cache.get(key)
    if kept is not None:
        return RefinedFit.from_arrays(kept)
    search_kw = {k: v for k, v in refine_kw.items() if k in SEARCH_KEYWORDS}
    search_key = content_digest("grid_search", {k: fields[k] for k in SEARCH_FIELDS
                                                if k in fields}, search_kw, code)
    kept = cache.get(search_key)
    if kept is not None:
        search = GridSearch.from_arrays(kept)
    else:
        search = grid_search(obs, **search_kw)
        cache.put(search_key, search.to_arrays())
    refined = refine_binary(obs, search=search, **refine_kw)
    cache.put(key, refined.to_arrays())
    return refined


def binary_product(view, instrument, *, exposure: str, search_radius_mas: float | None,
                   fit_kw: dict, use_phases: bool = True, n_boot: int = 50, seed: int = 0,
                   pointing_sigma_mas: tuple = (0.0, 0.0), cache_dir=None) -> dict:
    """Fit one calibrated exposure; returns the ``binary`` product's outputs.

    ``pointing_sigma_mas``: uncertainty of the pair's place in the fibre without and with
    calibrated referenced phases (see ``fit_binary``). ``cache_dir``: where the costly
    part of the fit is kept (module docstring); None keeps nothing."""
    # Referenced phases give the primary's offset only when their zero-point was solved
    # with the calibrators' own offsets; an interpolated zero-point still contains those
    # offsets (unknown, ~mas), so the phase reference is not calibrated: V2 and closure
    # phases only, primary offset NaN.
    zp_fitted = str(view.attrs.get("phase_zero_point", "fit")) == "fit"
    obs = observables_from_product(view, use_phases=use_phases and zp_fitted, n_draw=n_boot,
                                   seed=seed)
    fibre = float(instrument.fibre_fwhm_mas_at_2p2um)
    radius = fibre if search_radius_mas is None else float(search_radius_mas)
    summary_kw = {k: fit_kw[k] for k in SUMMARY_KEYWORDS if k in fit_kw}
    refine_kw = {k: v for k, v in fit_kw.items() if k not in SUMMARY_KEYWORDS}
    try:
        refined = refined_fit(obs, cache_dir=cache_dir, fibre_fwhm_mas=fibre,
                              search_radius_mas=radius, n_boot=n_boot, seed=seed, **refine_kw)
    except FitFailed as exc:
        raise BadInput(getattr(view, "path", "?"), str(exc)) from None
    res = summarise_fit(refined, fibre_fwhm_mas=fibre, search_radius_mas=radius,
                        pointing_sigma_mas=pointing_sigma_mas[int(obs.has_phase)], **summary_kw)
    p = json.loads(res.params_json)
    m2, mt, mp = binary_observables(
        obs.uvw, obs.wave, dra_mas=res.dra, ddec_mas=res.ddec, flux_ratio=res.flux_ratio,
        flux_slope=res.flux_slope, primary_dra_mas=p["primary_dra"]["value"],
        primary_ddec_mas=p["primary_ddec"]["value"],
        diameter1_mas=res.diameter1, diameter2_mas=res.diameter2, bandwidth_m=obs.bandwidth,
        fibre_fwhm_mas=fibre)
    a = view.attrs
    out = {k: v for k, v in to_jsonable(res).items() if k != "params_json"}
    zp_err = float(view.attrs.get("zero_point_astrometric_err_mas", 0.0))
    if obs.has_phase and np.isfinite(zp_err):       # the zero-point's own astrometric error
        out["primary_dra_err"] = float(np.hypot(res.primary_dra_err, zp_err))
        out["primary_ddec_err"] = float(np.hypot(res.primary_ddec_err, zp_err))
    out["primary_zero_point_err"] = zp_err
    out.update(lmfit_params=res.params_json, flag_doc=FLAG_DOC, exposure=exposure,
               target=str(a.get("object", "")), mjd=float(a.get("mjd", np.nan)),
               setup=str(a.get("setup", "")), polmode=str(a.get("polmode", "")),
               ra_deg=float(a.get("ra_deg", np.nan)), dec_deg=float(a.get("dec_deg", np.nan)),
               fibre_fwhm_mas=fibre, search_radius_mas=radius, has_phase=obs.has_phase,
               frac_rejected=float(a.get("frac_rejected", np.nan)),
               int_time_s=float(a.get("int_time_s", np.nan)))
    pb, pt = ("pol", "baseline", "wave"), ("pol", "triangle", "wave")
    out.update(
        chi2_map=Array(res.chi2_map, ("y", "x"), "", "chi2 of the global search, flux "
                       "ratio profiled; NaN outside the field"),
        grid_dra=Array(res.grid_dra, ("x",), "mas"), grid_ddec=Array(res.grid_ddec, ("y",), "mas"),
        minima=Array(res.minima, ("minimum", "column"), "", "dra mas, ddec mas, chi2"),
        vis2=Array(obs.vis2, pb, ""), vis2_err=Array(obs.vis2_err, pb, ""),
        t3phi=Array(obs.t3phi, pt, "rad"), t3phi_err=Array(obs.t3phi_err, pt, "rad"),
        model_vis2=Array(m2, ("baseline", "wave"), "", "best model"),
        model_t3phi=Array(mt, ("triangle", "wave"), "rad", "best model"),
        model_visphi=Array(mp, ("baseline", "wave"), "rad", "best model"),
        uvw=Array(np.asarray(obs.uvw).reshape(-1, 6, 3).mean(0), ("baseline", "uvw"), "m"),
        wave=Array(np.asarray(obs.wave), ("wave",), "m"))
    if obs.has_phase:
        out.update(visphi=Array(obs.visphi, pb, "rad"), visphi_err=Array(obs.visphi_err, pb, "rad"))
    return out


def to_jsonable(result: BinaryFitResult) -> dict:
    """Scalar fields of a result as a JSON-able dict (arrays and nested dataclasses flattened)."""
    out = {}
    for k, v in result.__dict__.items():
        if isinstance(v, (SepPA, ErrorEllipse)):
            pre = "" if isinstance(v, SepPA) else "ellipse_"
            out.update({pre + kk: float(vv) for kk, vv in v.__dict__.items()})
        elif isinstance(v, np.ndarray):
            if v.shape == (2, 2):
                out[k] = json.dumps(v.tolist())
        elif isinstance(v, tuple):
            out[k] = ",".join(v)
        else:
            out[k] = v
    return out
