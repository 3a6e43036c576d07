# SPDX-License-Identifier: BSD-3-Clause
"""Export of calibrated observables as OIFITS v2 files (astropy.io.fits).

The tables and keywords follow the OIFITS v2 standard (Duvert, Young & Hummel
2017, A&A 597, A8): main header (their Table 2), OI_TARGET, OI_ARRAY
(Table 4), OI_WAVELENGTH, OI_VIS2 (Table 6), OI_VIS (Table 7), OI_T3 and
OI_FLUX. Units in the files: metres for wavelengths and (u, v), degrees for
phases and sky positions, seconds for integration times, MJD (UTC) for epochs.

Conventions carried into the files:

* STA_INDEX of telescope beam i (0-based inside twinfield) is i + 1.
* OI_VIS2/OI_VIS row (i, j) has (UCOORD, VCOORD) = B_ij = P_j - P_i projected,
  with the complex visibility sign convention of OIFITS v2 (``pipeline.skymodel``).
* OI_T3 row (i, j, k): (U1, V1) = baseline (i, j), (U2, V2) = baseline (j, k);
  T3PHI is the phase of V_ij V_jk conj(V_ik) in degrees.
* Each polarisation of a split-polarisation set-up is its own INSNAME.
* FLAG is True where a value or its error is not finite.

One :class:`OiObservation` per exposure and polarisation; a file holds any
number of them (one exposure, or the merged file of a target and night).
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Sequence

import numpy as np
from astropy.io import fits

__all__ = ["OiArray", "OiObservation", "write_oifits", "BASELINES", "TRIANGLES"]

BASELINES = ((0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3))
TRIANGLES = ((0, 1, 2), (0, 1, 3), (0, 2, 3), (1, 2, 3))


@dataclass(frozen=True)
class OiArray:
    """The array as OI_ARRAY describes it.

    Attributes
    ----------
    arrname : str
    centre_m : (3,) geocentric (ITRS) X, Y, Z of the array centre, metres
    tel_names, sta_names : tuple of str, one per telescope beam
    staxyz_m : (n_tel, 3) station offsets from the centre, geocentric axes, metres
    diameter_m : float
    fov_arcsec : float, photometric field of view (FWHM of the fibre acceptance)
    """
    arrname: str
    centre_m: tuple
    tel_names: tuple
    sta_names: tuple
    staxyz_m: np.ndarray
    diameter_m: float
    fov_arcsec: float

    @classmethod
    def from_instrument(cls, instrument, station_names: Sequence[str] | None = None):
        """Build from the instrument model; ``station_names`` from the header's
        STATIONn (defaults to the model's stations in order)."""
        by_name = {s.name: np.asarray(s.enu_m, float) for s in instrument.stations}
        names = (tuple(station_names) if station_names
                 else tuple(s.name for s in instrument.stations))
        missing = [n for n in names if n not in by_name]
        if missing:
            raise ValueError(f"stations {missing} are not in the instrument model "
                             f"(known: {sorted(by_name)})")
        enu = np.array([by_name[n] for n in names])
        site = instrument.site
        loc = site.earth_location()
        lat, lon = np.deg2rad(site.latitude_deg), np.deg2rad(site.longitude_deg)
        east = np.array([-np.sin(lon), np.cos(lon), 0.0])
        north = np.array([-np.sin(lat) * np.cos(lon), -np.sin(lat) * np.sin(lon), np.cos(lat)])
        up = np.array([np.cos(lat) * np.cos(lon), np.cos(lat) * np.sin(lon), np.sin(lat)])
        xyz = enu[:, :1] * east + enu[:, 1:2] * north + enu[:, 2:3] * up
        return cls(arrname=site.name.upper().replace(" ", "_"),
                   centre_m=tuple(float(q.to_value("m")) for q in (loc.x, loc.y, loc.z)),
                   tel_names=tuple(f"T{i + 1}" for i in range(len(names))), sta_names=names,
                   staxyz_m=xyz, diameter_m=float(instrument.telescope_diameter_m),
                   fov_arcsec=float(instrument.fibre_fwhm_mas_at_2p2um) / 1e3)


@dataclass(frozen=True)
class OiObservation:
    """Observables of one exposure and polarisation.

    Attributes
    ----------
    target : str, ra_deg, dec_deg : float (ICRS, degrees); category : "SCI" or "CAL"
    date_obs : str, ISO 8601 UTC start of the exposure
    mjd : float, MJD (UTC) of the middle of the exposure; int_time_s : float, s
    insname : str
    wave_m, band_m : (n_wave,), metres
    uvw_m : (6, 3), metres, baselines in the order of BASELINES
    vis2, vis2_err : (6, n_wave)
    visamp, visamp_err : (6, n_wave); visphi_rad, visphi_err_rad : (6, n_wave)
    t3amp, t3amp_err : (4, n_wave); t3phi_rad, t3phi_err_rad : (4, n_wave)
    flux, flux_err : (4, n_wave); flux_unit : str (FITS unit string)
    flux_calibrated : bool
    """
    target: str
    ra_deg: float
    dec_deg: float
    date_obs: str
    mjd: float
    int_time_s: float
    insname: str
    wave_m: np.ndarray
    band_m: np.ndarray
    uvw_m: np.ndarray
    vis2: np.ndarray
    vis2_err: np.ndarray
    visamp: np.ndarray
    visamp_err: np.ndarray
    visphi_rad: np.ndarray
    visphi_err_rad: np.ndarray
    t3amp: np.ndarray
    t3amp_err: np.ndarray
    t3phi_rad: np.ndarray
    t3phi_err_rad: np.ndarray
    flux: np.ndarray
    flux_err: np.ndarray
    flux_unit: str = "ct/s"
    flux_calibrated: bool = False
    category: str = "SCI"


def _flag(*arrays):
    out = np.zeros(np.shape(arrays[0]), bool)
    for a in arrays:
        out |= ~np.isfinite(a)
    return out


def _col(name, fmt, array, unit=None):
    return fits.Column(name=name, format=fmt, array=array, unit=unit)


def _table(extname, columns, keywords):
    hdu = fits.BinTableHDU.from_columns(columns)
    hdu.header["EXTNAME"] = extname
    for key, (value, comment) in keywords.items():
        hdu.header[key] = (value, comment)
    return hdu


def _primary(obs, array, *, origin, observer, instrume, procsoft):
    insnames = sorted({o.insname for o in obs})
    targets = sorted({o.target for o in obs})
    first = min(obs, key=lambda o: o.mjd)
    h = fits.Header()
    # OIFITS v2 main header (Duvert et al. 2017, Table 2)
    h["ORIGIN"] = (origin, "Institution responsible for file creation")
    h["DATE"] = (datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S"), "HDU written (UTC)")
    h["DATE-OBS"] = (first.date_obs, "Start of the first observation (UTC)")
    h["CONTENT"] = ("OIFITS2", "OIFITS v2 container")
    h["TELESCOP"] = (array.arrname, "Array")
    h["INSTRUME"] = (instrume, "Instrument")
    h["OBSERVER"] = (observer, "Who acquired the data")
    h["OBJECT"] = (targets[0] if len(targets) == 1 else "MULTI", "Object identifier")
    h["INSMODE"] = (insnames[0] if len(insnames) == 1 else "MULTI", "Instrument mode")
    h["PROCSOFT"] = (procsoft, "Data reduction software")
    h["OBSTECH"] = ("ABCD, PH_REF", "Technique of observation")
    if len(targets) == 1:
        h["RA"] = (float(first.ra_deg), "Target RA (deg, ICRS)")
        h["DEC"] = (float(first.dec_deg), "Target Dec (deg, ICRS)")
        h["RADECSYS"] = ("ICRS", "Coordinate reference frame")
    h["MJD-OBS"] = (min(o.mjd - o.int_time_s / 172800 for o in obs), "Start (MJD, UTC)")
    h["MJD-END"] = (max(o.mjd + o.int_time_s / 172800 for o in obs), "End (MJD, UTC)")
    return fits.PrimaryHDU(header=h)


def write_oifits(path, observations: Sequence[OiObservation], array: OiArray, *,
                 origin: str = "twinfield", observer: str = "UNKNOWN",
                 instrume: str = "FOURFOLD", procsoft: str | None = None) -> Path:
    """Write an OIFITS v2 file holding ``observations`` (written atomically).

    Returns
    -------
    pathlib.Path of the written file.
    """
    if procsoft is None:
        from pipeline import __version__
        procsoft = f"twinfield {__version__}"
    obs = list(observations)
    if not obs:
        raise ValueError("write_oifits needs at least one observation")
    path = Path(path)
    hdus = [_primary(obs, array, origin=origin, observer=observer, instrume=instrume,
                     procsoft=procsoft)]

    # OI_TARGET (Duvert et al. 2017, Table 3; units from memory of the table)
    targets = {}
    for o in obs:
        targets.setdefault(o.target, o)
    names = list(targets)
    tid = {name: k + 1 for k, name in enumerate(names)}
    n_t = len(names)
    t_rows = [targets[n] for n in names]
    zeros = np.zeros(n_t)
    hdus.append(_table("OI_TARGET", [
        _col("TARGET_ID", "1I", np.arange(1, n_t + 1)),
        _col("TARGET", "16A", names),
        _col("RAEP0", "1D", [o.ra_deg for o in t_rows], "deg"),
        _col("DECEP0", "1D", [o.dec_deg for o in t_rows], "deg"),
        _col("EQUINOX", "1E", np.full(n_t, 2000.0), "yr"),
        _col("RA_ERR", "1D", zeros, "deg"), _col("DEC_ERR", "1D", zeros, "deg"),
        _col("SYSVEL", "1D", zeros, "m/s"),
        _col("VELTYP", "8A", ["UNKNOWN"] * n_t), _col("VELDEF", "8A", ["OPTICAL"] * n_t),
        _col("PMRA", "1D", zeros, "deg/yr"), _col("PMDEC", "1D", zeros, "deg/yr"),
        _col("PMRA_ERR", "1D", zeros, "deg/yr"), _col("PMDEC_ERR", "1D", zeros, "deg/yr"),
        _col("PARALLAX", "1E", zeros, "deg"), _col("PARA_ERR", "1E", zeros, "deg"),
        _col("SPECTYP", "16A", ["UNKNOWN"] * n_t),
        _col("CATEGORY", "3A", [o.category for o in t_rows]),
    ], {"OI_REVN": (2, "Revision of the table definition")}))

    # OI_ARRAY (Duvert et al. 2017, Table 4)
    n_tel = len(array.tel_names)
    hdus.append(_table("OI_ARRAY", [
        _col("TEL_NAME", "16A", list(array.tel_names)),
        _col("STA_NAME", "16A", list(array.sta_names)),
        _col("STA_INDEX", "1I", np.arange(1, n_tel + 1)),
        _col("DIAMETER", "1E", np.full(n_tel, array.diameter_m), "m"),
        _col("STAXYZ", "3D", np.asarray(array.staxyz_m, float), "m"),
        _col("FOV", "1D", np.full(n_tel, array.fov_arcsec), "arcsec"),
        _col("FOVTYPE", "6A", ["FWHM"] * n_tel),
    ], {"OI_REVN": (2, "Revision of the table definition"),
        "ARRNAME": (array.arrname, "Array name"),
        "FRAME": ("GEOCENTRIC", "Coordinate frame"),
        "ARRAYX": (array.centre_m[0], "[m] Array centre X"),
        "ARRAYY": (array.centre_m[1], "[m] Array centre Y"),
        "ARRAYZ": (array.centre_m[2], "[m] Array centre Z")}))

    by_ins = {}
    for o in obs:
        by_ins.setdefault(o.insname, []).append(o)
    for insname, group in by_ins.items():
        wave = group[0].wave_m
        for o in group[1:]:
            if not np.array_equal(o.wave_m, wave):
                raise ValueError(f"observations with INSNAME {insname!r} have different "
                                 "wavelength grids")
        hdus += _data_tables(insname, group, array.arrname, tid)
    hdul = fits.HDUList(hdus)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.tmp")
    hdul.writeto(tmp, overwrite=True)
    tmp.replace(path)
    return path


def _data_tables(insname, group, arrname, tid):
    o0 = group[0]
    nw = len(o0.wave_m)
    wf = f"{nw}D"
    lf = f"{nw}L"
    date = min(group, key=lambda o: o.mjd).date_obs[:10]
    out = [_table("OI_WAVELENGTH", [
        _col("EFF_WAVE", "1E", np.asarray(o0.wave_m, float), "m"),
        _col("EFF_BAND", "1E", np.asarray(o0.band_m, float), "m"),
    ], {"OI_REVN": (2, "Revision of the table definition"),
        "INSNAME": (insname, "Instrument set-up")})]
    keys = {"OI_REVN": (2, "Revision of the table definition"),
            "DATE-OBS": (date, "UTC start date of observations"),
            "ARRNAME": (arrname, "Identifies the OI_ARRAY table"),
            "INSNAME": (insname, "Identifies the OI_WAVELENGTH table")}
    nb, ntr = len(BASELINES), len(TRIANGLES)

    def rows(attr):
        return np.concatenate([np.asarray(getattr(o, attr), float) for o in group])

    def scalar(per, f):
        return np.concatenate([np.full(per, f(o), float) for o in group])

    sta2 = np.tile(np.array(BASELINES) + 1, (len(group), 1))
    sta3 = np.tile(np.array(TRIANGLES) + 1, (len(group), 1))
    uvw = np.concatenate([np.asarray(o.uvw_m, float) for o in group])
    common_b = [_col("TARGET_ID", "1I", scalar(nb, lambda o: tid[o.target]).astype(int)),
                _col("TIME", "1D", np.zeros(nb * len(group)), "s"),
                _col("MJD", "1D", scalar(nb, lambda o: o.mjd), "d"),
                _col("INT_TIME", "1D", scalar(nb, lambda o: o.int_time_s), "s")]
    v2, v2e = rows("vis2"), rows("vis2_err")
    out.append(_table("OI_VIS2", common_b + [
        _col("VIS2DATA", wf, v2), _col("VIS2ERR", wf, v2e),
        _col("UCOORD", "1D", uvw[:, 0], "m"), _col("VCOORD", "1D", uvw[:, 1], "m"),
        _col("STA_INDEX", "2I", sta2), _col("FLAG", lf, _flag(v2, v2e))], keys))
    va, vae = rows("visamp"), rows("visamp_err")
    vp, vpe = np.rad2deg(rows("visphi_rad")), np.rad2deg(rows("visphi_err_rad"))
    out.append(_table("OI_VIS", common_b + [
        _col("VISAMP", wf, va), _col("VISAMPERR", wf, vae),
        _col("VISPHI", wf, vp, "deg"), _col("VISPHIERR", wf, vpe, "deg"),
        _col("UCOORD", "1D", uvw[:, 0], "m"), _col("VCOORD", "1D", uvw[:, 1], "m"),
        _col("STA_INDEX", "2I", sta2), _col("FLAG", lf, _flag(va, vae, vp, vpe))],
        dict(keys, AMPTYP=("absolute", "Amplitude type"), PHITYP=("absolute", "Phase type"))))
    k = {b: n for n, b in enumerate(BASELINES)}
    i12 = np.array([k[(a, b)] for a, b, _ in TRIANGLES])
    i23 = np.array([k[(b, c)] for _, b, c in TRIANGLES])
    uv1 = np.concatenate([np.asarray(o.uvw_m)[i12] for o in group])
    uv2 = np.concatenate([np.asarray(o.uvw_m)[i23] for o in group])
    ta, tae = rows("t3amp"), rows("t3amp_err")
    tp, tpe = np.rad2deg(rows("t3phi_rad")), np.rad2deg(rows("t3phi_err_rad"))
    out.append(_table("OI_T3", [
        _col("TARGET_ID", "1I", scalar(ntr, lambda o: tid[o.target]).astype(int)),
        _col("TIME", "1D", np.zeros(ntr * len(group)), "s"),
        _col("MJD", "1D", scalar(ntr, lambda o: o.mjd), "d"),
        _col("INT_TIME", "1D", scalar(ntr, lambda o: o.int_time_s), "s"),
        _col("T3AMP", wf, ta), _col("T3AMPERR", wf, tae),
        _col("T3PHI", wf, tp, "deg"), _col("T3PHIERR", wf, tpe, "deg"),
        _col("U1COORD", "1D", uv1[:, 0], "m"), _col("V1COORD", "1D", uv1[:, 1], "m"),
        _col("U2COORD", "1D", uv2[:, 0], "m"), _col("V2COORD", "1D", uv2[:, 1], "m"),
        _col("STA_INDEX", "3I", sta3), _col("FLAG", lf, _flag(ta, tae, tp, tpe))], keys))
    nt = 4
    fl, fle = rows("flux"), rows("flux_err")
    unit = o0.flux_unit
    out.append(_table("OI_FLUX", [
        _col("TARGET_ID", "1I", scalar(nt, lambda o: tid[o.target]).astype(int)),
        _col("MJD", "1D", scalar(nt, lambda o: o.mjd), "d"),
        _col("INT_TIME", "1D", scalar(nt, lambda o: o.int_time_s), "s"),
        _col("FLUXDATA", wf, fl, unit), _col("FLUXERR", wf, fle, unit),
        _col("STA_INDEX", "1I", np.tile(np.arange(1, nt + 1), len(group))),
        _col("FLAG", lf, _flag(fl, fle))],
        {"OI_REVN": (1, "Revision of the table definition"),
         **{kk: keys[kk] for kk in ("DATE-OBS", "ARRNAME", "INSNAME")},
         "CALSTAT": ("C" if o0.flux_calibrated else "U", "Calibration status")}))
    return out
