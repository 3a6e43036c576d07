# SPDX-License-Identifier: BSD-3-Clause
"""Stage glue of ``average`` and ``calibrate``: products in, products out.

The numerics live in ``pipeline.numerics.averaging`` and
``pipeline.numerics.transfer``; this module reads upstream products (any
mapping-like ``view`` with ``view["name"]`` and ``view.attrs``), header facts
and the instrument model, and builds the output dictionaries the store writes.

Calibration (per science exposure, from the average products of the night's
calibrators of the same set-up and polarisation mode):

* V2 (and visibility amplitude, T3 amplitude) divided by the transfer
  function, interpolated linearly in time between the calibrators bracketing
  the science exposure (nearest calibrator outside their span);
* closure phases minus the calibrators' zero-points (measured minus the
  uniform-disk model's phase, 0 or pi), interpolated the same way on the circle;
  referenced phases minus a zero-point fitted as constant over the night jointly
  with each calibrator star's pointing offset, or interpolated like the closure
  phases when the calibrators' (u, v) coverage cannot separate the two;
* covariances between wavelengths: the science covariance scaled by the
  transfer function (V2) or added to the interpolated calibrator covariance
  (phases).
"""

from __future__ import annotations

import json
import zlib

import numpy as np

from .errors import BadInput, MissingCalibration
from .geometry import hour_angle_rad, uvw_from_enu
from .numerics.averaging import TRIANGLES, average_exposure
from .numerics.transfer import (calibrate_phase, fit_phase_zero_point, interpolate_in_time,
                                interpolate_phase_in_time, interpolation_weights,
                                transfer_function, uniform_disk_vis2, wrap_phase)
from .skymodel import MAS
from .oifits import OiArray, OiObservation
from .stage import Array

__all__ = ["header_facts", "exposure_uvw", "average_product", "calibrate_product",
           "oifits_observations", "exposure_seed", "OutputsView", "array_for"]

_PB, _PT = ("pol", "baseline", "wave"), ("pol", "triangle", "wave")
_PTEL = ("pol", "telescope", "wave")


def exposure_seed(label: str, seed: int) -> int:
    """A reproducible bootstrap seed per exposure (CRC32 of its label plus ``seed``)."""
    return (zlib.crc32(label.encode()) + int(seed)) % (2 ** 32)


def header_facts(header) -> dict:
    """The facts of a raw primary header the averaged product keeps (JSON-able)."""
    h = header
    return {"object": str(h.get("OBJECT", "")), "kind": str(h.get("FRAMEKND", "")),
            "setup": str(h.get("SPECSET", "")), "polmode": str(h.get("POLMODE", "")),
            "ra_deg": float(h.get("RA", np.nan)), "dec_deg": float(h.get("DEC", np.nan)),
            "mjd_start": float(h["MJD-OBS"]), "date_obs": str(h["DATE-OBS"]),
            "caldiam_mas": float(h.get("CALDIAM", np.nan)),
            "caldiam_err_mas": float(h.get("CALDIAME", np.nan)),
            "stations": json.dumps([str(h.get(f"STATION{i}", "")) for i in range(1, 5)])}


def exposure_uvw(instrument, facts: dict, mjd: float) -> np.ndarray:
    """(u, v, w) of the 6 baselines at ``mjd`` for the science pointing, shape (6, 3), m."""
    from astropy.time import Time
    names = json.loads(facts["stations"])
    by_name = {s.name: np.asarray(s.enu_m, float) for s in instrument.stations}
    if all(n in by_name for n in names):
        enu = np.array([by_name[n] for n in names])
        b = np.array([enu[j] - enu[i] for i, j in instrument.combiner.baselines])
    else:
        b = instrument.baseline_enu_m
    h = hour_angle_rad(Time(mjd, format="mjd", scale="utc"), facts["ra_deg"],
                       instrument.site.longitude_deg)
    return uvw_from_enu(b, h, np.deg2rad(facts["dec_deg"]),
                        np.deg2rad(instrument.site.latitude_deg))[0]


def average_product(extract, reference, header, instrument, *, label: str, n_boot: int,
                    seed: int, use_contrast_loss: bool = True, band_m=None,
                    band_baseline_m=None) -> dict:
    """Average one exposure (``extract`` and ``reference`` products) into the
    ``average`` product's outputs. ``band_m`` (wave,) is each channel's FWHM,
    ``band_baseline_m`` (pol, baseline, wave) each baseline's effective fringe
    bandwidth (wavecal's ``bandwidth_baseline``), passed on for the smearing model."""
    facts = header_facts(header)
    coherent = reference["coherent_ref"]
    valid = reference["frame_valid"] if "frame_valid" in reference else None
    loss = (reference["contrast_loss"]
            if use_contrast_loss and "contrast_loss" in reference else None)
    wave = np.asarray(extract["wave"], float)
    s = exposure_seed(label, seed)
    # optional: the variance of errors common to every frame (subtracted background),
    # included in coherent_var / flux_var; propagated separately (the bootstrap cannot)
    s2 = np.asarray(extract["coherent_var"], float)
    vc = vf = None
    if "coherent_var_common" in extract:
        vc = np.asarray(extract["coherent_var_common"], float)
        s2 = np.clip(s2 - vc[None], 0.0, None)
    if "flux_var_common" in extract:
        vf = np.asarray(extract["flux_var_common"], float)
    raw = extract["coherent"] if "coherent" in extract else None
    try:
        res = average_exposure(coherent, s2, extract["flux"], frame_valid=valid,
                               contrast_loss=loss, coherent_raw=raw, coherent_var_common=vc,
                               flux_var_common=vf, n_boot=n_boot, seed=s, nan_policy="omit")
    except ValueError as exc:
        raise BadInput(getattr(reference, "path", label), str(exc)) from None
    start, exp = np.asarray(extract["frame_start"], float), np.asarray(extract["frame_exp"], float)
    used = valid.any(axis=1) if valid is not None else np.ones(start.shape, bool)
    if not used.any():
        raise BadInput(getattr(reference, "path", label), "no valid frame on any baseline")
    mid_s = float(np.mean(start[used] + exp[used] / 2))
    mjd = facts["mjd_start"] + mid_s / 86400.0
    uvw = exposure_uvw(instrument, facts, mjd)
    band = (np.abs(np.gradient(wave)) if band_m is None or np.shape(band_m) != wave.shape
            else np.asarray(band_m, float))
    n_frame = len(start)
    frac = 1.0 - (valid.sum() / valid.size if valid is not None else 1.0)
    cov_w = ("pol", "baseline", "wave", "wave2")
    extra = {}
    if band_baseline_m is not None and np.shape(band_baseline_m)[-1] == wave.size:
        extra["band_baseline"] = Array(np.asarray(band_baseline_m, float), _PB, "m",
                                       "effective fringe bandwidth per baseline")
    return dict(**extra,
        vis2=Array(res.vis2, _PB, "", "bias-corrected squared visibility"),
        vis2_err=Array(res.vis2_err, _PB, "", "bootstrap error"),
        vis2_cov=Array(res.vis2_cov, cov_w, "", "bootstrap covariance between wavelengths"),
        t3phi=Array(res.t3phi, _PT, "rad", "closure phase, arg <C_ij C_jk conj(C_ik)>"),
        t3phi_err=Array(res.t3phi_err, _PT, "rad"),
        t3phi_cov=Array(res.t3phi_cov, ("pol", "triangle", "wave", "wave2"), "rad2"),
        t3amp=Array(res.t3amp, _PT, ""), t3amp_err=Array(res.t3amp_err, _PT, ""),
        visamp=Array(res.visamp, _PB, "", "coherently averaged visibility amplitude"),
        visamp_err=Array(res.visamp_err, _PB, ""),
        visphi=Array(res.visphi, _PB, "rad", "referenced phase (before zero-point)"),
        visphi_err=Array(res.visphi_err, _PB, "rad"),
        visphi_cov=Array(res.visphi_cov, cov_w, "rad2", "bootstrap covariance"),
        flux=Array(res.flux, _PTEL, "e-/s", "mean photometric flux"),
        flux_err=Array(res.flux_err, _PTEL, "e-/s"),
        n_valid=Array(res.n_valid, ("baseline",), "", "frames used per baseline"),
        uvw=Array(uvw, ("baseline", "uvw"), "m", "at the exposure's mean time"),
        wave=Array(wave, ("wave",), "m"), band=Array(band, ("wave",), "m"),
        mjd=mjd, int_time_s=float(np.sum(exp[used])), n_frame=n_frame,
        frac_rejected=float(frac), bootstrap_seed=int(s), n_boot=int(n_boot),
        contrast_loss_corrected=bool(loss is not None), **facts)


def _cal_expectation(view):
    """Uniform-disk V2, |V|, arg V and triple products of a calibrator product."""
    a = view.attrs
    diam, derr = a.get("caldiam_mas", np.nan), a.get("caldiam_err_mas", np.nan)
    if not np.isfinite(diam):
        raise BadInput(getattr(view, "path", "?"), "calibrator without a CALDIAM diameter")
    derr = derr if np.isfinite(derr) else 0.0
    uvw, wave = view["uvw"], view["wave"]
    vis, v2, v2e = uniform_disk_vis2(uvw[:, 0:1], uvw[:, 1:2], wave[None, :], diam, derr)
    k = {b: n for n, b in enumerate(((0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3)))}
    t3 = np.array([vis[k[(i, j)]] * vis[k[(j, kk)]] * vis[k[(i, kk)]] for i, j, kk in TRIANGLES])
    return vis, v2, v2e, t3


def calibrate_product(science, calibrators, *, science_path: str = "", method: str = "linear",
                      scatter_floor: float = 0.0, phase_zero_point: str = "fit") -> dict:
    """Calibrate one science ``average`` product with the calibrators' ones.

    ``phase_zero_point="fit"`` solves the referenced-phase zero-point jointly with
    each calibrator star's own pointing offset (``transfer.fit_phase_zero_point``,
    constant zero-point over the night) when the calibrators' (u, v) coverage
    allows, else falls back to the interpolation of the calibrators' phases.

    Raises
    ------
    MissingCalibration
        When ``calibrators`` is empty (naming the science exposure).
    """
    sa = science.attrs
    if not calibrators:
        raise MissingCalibration(science_path or sa.get("object", "?"),
                                 f"no calibrator star of set-up {sa.get('setup')!r}, "
                                 f"polarisation {sa.get('polmode')!r} in the night: the "
                                 "transfer function cannot be measured")
    cals = sorted(calibrators, key=lambda v: v.attrs["mjd"])
    t_cal = np.array([c.attrs["mjd"] for c in cals])
    t = np.array([sa["mjd"]])
    wave = science["wave"]
    for c in cals:
        if c["wave"].shape != wave.shape or not np.allclose(c["wave"], wave, rtol=1e-6):
            raise BadInput(getattr(c, "path", "?"), "calibrator wavelength grid differs from "
                                                     "the science exposure's")
    exp = [_cal_expectation(c) for c in cals]
    tf2, tf2e = zip(*[transfer_function(c["vis2"], c["vis2_err"], e[1], e[2])
                      for c, e in zip(cals, exp)])
    tfa, tfae = zip(*[transfer_function(c["visamp"], c["visamp_err"], np.abs(e[0]),
                                        e[2] / np.maximum(2 * np.abs(e[0]), 1e-12))
                      for c, e in zip(cals, exp)])
    tft, tfte = zip(*[transfer_function(c["t3amp"], c["t3amp_err"], np.abs(e[3]), 0.0)
                      for c, e in zip(cals, exp)])
    zp_vis = [wrap_phase(c["visphi"] - np.angle(e[0].astype(complex))) for c, e in zip(cals, exp)]
    zp_t3 = [wrap_phase(c["t3phi"] - np.angle(e[3].astype(complex))) for c, e in zip(cals, exp)]
    kw = dict(method=method)
    T2, T2e = (x[0] for x in interpolate_in_time(t_cal, np.array(tf2), np.array(tf2e), t,
                                                  scatter_floor=scatter_floor, **kw))
    TA, TAe = (x[0] for x in interpolate_in_time(t_cal, np.array(tfa), np.array(tfae), t, **kw))
    TT, TTe = (x[0] for x in interpolate_in_time(t_cal, np.array(tft), np.array(tfte), t, **kw))
    ZV, ZVe = (x[0] for x in interpolate_phase_in_time(
        t_cal, np.array(zp_vis), np.array([c["visphi_err"] for c in cals]), t, **kw))
    ZT, ZTe = (x[0] for x in interpolate_phase_in_time(
        t_cal, np.array(zp_t3), np.array([c["t3phi_err"] for c in cals]), t, **kw))
    lo, hi, a = (x[0] for x in interpolation_weights(t_cal, t, **kw))
    zp_cov = (1 - a) ** 2 * cals[lo]["visphi_cov"] + a ** 2 * cals[hi]["visphi_cov"]
    offsets_mas, fitted, zp_astro_err_mas = {}, False, float("nan")
    if phase_zero_point == "fit" and len(cals) >= 2:
        names = sorted({str(c.attrs.get("object", "")) for c in cals})
        star = np.array([names.index(str(c.attrs.get("object", ""))) for c in cals])
        uv = np.array([c["uvw"] for c in cals])
        zp, zpe, off, off_cov, fitted = fit_phase_zero_point(
            np.array(zp_vis), np.array([c["visphi_err"] for c in cals]), uv[..., 0],
            uv[..., 1], wave, star)
        if fitted:
            ZV, ZVe = zp, zpe
            zp_cov = _outer(zpe) * np.eye(wave.size)
            offsets_mas = {n: (off[:, s] / MAS).tolist() for s, n in enumerate(names)}
            # The zero-point is tied to the calibrators' fitted positions: their error moves
            # every referenced phase coherently (all wavelengths), i.e. it is an error of
            # the science pointing. Largest per-axis 1-sigma over the stars, mas.
            zp_astro_err_mas = float(np.sqrt(np.max(np.diagonal(off_cov, axis1=1, axis2=2)))
                                     / MAS)

    v2, v2e = transfer_function(science["vis2"], science["vis2_err"], T2, T2e)
    va, vae = transfer_function(science["visamp"], science["visamp_err"], TA, TAe)
    ta, tae = transfer_function(science["t3amp"], science["t3amp_err"], TT, TTe)
    vp, vpe = calibrate_phase(science["visphi"], science["visphi_err"], ZV, ZVe)
    tp, tpe = calibrate_phase(science["t3phi"], science["t3phi_err"], ZT, ZTe)
    # covariance between wavelengths: science term plus the interpolated transfer-function
    # covariance (calibrator bootstrap + diameter error, the latter fully correlated)
    tf_covs = [_outer_div(c["vis2_cov"], e[1]) + _outer(t * e[2] / e[1])
               for c, e, t in zip(cals, exp, tf2)]
    tf_cov = (1 - a) ** 2 * tf_covs[lo] + a ** 2 * tf_covs[hi]
    tf_cov = tf_cov + _outer(scatter_floor * (tf2[hi] - tf2[lo]))     # systematic term
    v2cov = _outer_div(science["vis2_cov"], T2) + _outer(v2) * _outer_div(tf_cov, T2)
    pcov = science["visphi_cov"] + zp_cov
    tcov = (science["t3phi_cov"] + (1 - a) ** 2 * cals[lo]["t3phi_cov"]
            + a ** 2 * cals[hi]["t3phi_cov"])
    out = {k: science[k] for k in ("flux", "flux_err", "uvw", "wave", "band", "n_valid",
                                   "band_baseline") if k in science}
    out = {k: Array(v, tuple(science.axes(k)) if hasattr(science, "axes") else _axes(k),
                    _unit(science, k)) for k, v in out.items()}
    cov_w = ("pol", "baseline", "wave", "wave2")
    out.update(
        vis2=Array(v2, _PB, "", "calibrated squared visibility"), vis2_err=Array(v2e, _PB, ""),
        vis2_cov=Array(v2cov, cov_w, ""),
        visamp=Array(va, _PB, ""), visamp_err=Array(vae, _PB, ""),
        visphi=Array(vp, _PB, "rad", "referenced phase minus the calibrators' zero-point"),
        visphi_err=Array(vpe, _PB, "rad"), visphi_cov=Array(pcov, cov_w, "rad2"),
        t3phi=Array(tp, _PT, "rad"), t3phi_err=Array(tpe, _PT, "rad"),
        t3phi_cov=Array(tcov, ("pol", "triangle", "wave", "wave2"), "rad2"),
        t3amp=Array(ta, _PT, ""), t3amp_err=Array(tae, _PT, ""),
        tf_vis2=Array(T2, _PB, "", "transfer function at the science time"),
        tf_vis2_err=Array(T2e, _PB, ""),
        visphi_zero_point=Array(ZV, _PB, "rad"), t3phi_zero_point=Array(ZT, _PT, "rad"),
        calibrators=json.dumps([str(c.attrs.get("label", getattr(c, "path", "?")))
                                for c in cals]),
        calibrator_mjd=json.dumps(t_cal.tolist()), interpolation=method,
        phase_zero_point="fit" if fitted else "interpolate",
        zero_point_astrometric_err_mas=zp_astro_err_mas,
        calibrator_offsets_mas=json.dumps(offsets_mas))
    for k, v in sa.items():
        if k in ("object", "kind", "setup", "polmode", "ra_deg", "dec_deg", "mjd", "mjd_start",
                 "date_obs", "int_time_s", "stations", "n_frame", "frac_rejected"):
            out[k] = v
    return out


def _outer(x):
    """(..., wave) -> (..., wave, wave) outer product x_w x_w'."""
    return x[..., :, None] * x[..., None, :]


def _outer_div(cov, x):
    """cov_ww' / (x_w x_w')."""
    return cov / _outer(x)


def _axes(name):
    return {"flux": _PTEL, "flux_err": _PTEL, "uvw": ("baseline", "uvw"), "wave": ("wave",),
            "band": ("wave",), "n_valid": ("baseline",), "band_baseline": _PB}[name]


def _unit(view, name):
    try:
        return view.unit(name)
    except (AttributeError, KeyError):
        units = {"flux": "e-/s", "flux_err": "e-/s", "uvw": "m", "wave": "m", "band": "m",
                 "band_baseline": "m"}
        return units.get(name, "")


def oifits_observations(product, *, label: str = "", category: str = "SCI",
                        instrument_name: str = "FOURFOLD") -> list[OiObservation]:
    """One :class:`OiObservation` per polarisation from a (calibrated) product."""
    a = product.attrs
    n_pol = product["vis2"].shape[0]
    obs = []
    for p in range(n_pol):
        ins = f"{instrument_name}_{a['setup']}_{a['polmode']}"
        ins += f"_P{p + 1}" if n_pol > 1 else ""
        obs.append(OiObservation(
            target=str(a["object"]), ra_deg=float(a["ra_deg"]), dec_deg=float(a["dec_deg"]),
            date_obs=str(a["date_obs"]), mjd=float(a["mjd"]), int_time_s=float(a["int_time_s"]),
            insname=ins, wave_m=product["wave"], band_m=product["band"], uvw_m=product["uvw"],
            vis2=product["vis2"][p], vis2_err=product["vis2_err"][p],
            visamp=product["visamp"][p], visamp_err=product["visamp_err"][p],
            visphi_rad=product["visphi"][p], visphi_err_rad=product["visphi_err"][p],
            t3amp=product["t3amp"][p], t3amp_err=product["t3amp_err"][p],
            t3phi_rad=product["t3phi"][p], t3phi_err_rad=product["t3phi_err"][p],
            flux=product["flux"][p], flux_err=product["flux_err"][p], flux_unit="ct/s",
            category=category))
    return obs


def array_for(product, instrument) -> OiArray:
    """OI_ARRAY description from the product's station names (header STATIONn)."""
    names = json.loads(product.attrs.get("stations", "[]"))
    known = {s.name for s in instrument.stations}
    return OiArray.from_instrument(instrument, names if names and set(names) <= known else None)


class OutputsView:
    """Read a stage's output dictionary like a product (``view["name"]``, ``.attrs``,
    ``.axes(name)``), e.g. to export what ``calibrate`` just computed."""

    def __init__(self, outputs: dict, path: str = ""):
        self._arrays = {k: v for k, v in outputs.items() if isinstance(v, (Array, np.ndarray))}
        self.attrs = {k: v for k, v in outputs.items() if k not in self._arrays}
        self.path = path

    def __contains__(self, name):
        return name in self._arrays

    def __getitem__(self, name):
        v = self._arrays[name]
        return np.asarray(v.data if isinstance(v, Array) else v)

    def axes(self, name):
        v = self._arrays[name]
        return v.axes if isinstance(v, Array) else _axes(name)

    def unit(self, name):
        v = self._arrays[name]
        return v.unit if isinstance(v, Array) else ""
