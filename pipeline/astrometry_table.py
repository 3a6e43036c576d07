# SPDX-License-Identifier: BSD-3-Clause
"""The night's astrometry table: one row per science exposure, written as ECSV, FITS
and CSV for orbit fitters.

Units live in the ECSV header and the FITS TUNITn keywords (CSV is plain, with the
unit in each column's description of this module). Table metadata: the code
version, a configuration hash (of the ``binary`` products' content keys, which
cover every parameter and input upstream), the conventions and the flag bits.
"""

from __future__ import annotations

import hashlib
import json
import math
from pathlib import Path

import numpy as np

__all__ = ["COLUMNS", "CONVENTIONS", "row_from_binary", "astrometry_table", "write_astrometry",
           "config_hash"]

CONVENTIONS = (
    "dra = dRA cos(Dec) (East positive), ddec = dDec (North positive), companion minus "
    "primary, mas; primary_dra/primary_ddec: primary minus the science pointing, mas "
    "(NaN without calibrated referenced phases); pa and ellipse_pa in degrees East of "
    "North; errors 1 sigma (larger of the chi2_red-scaled covariance and the bootstrap); "
    "flux_ratio: true on-sky companion/primary ratio at 2.2 um (fibre attenuation "
    "removed); mjd UTC at the exposure's mean time; jyear Julian epoch; wavelengths vacuum.")

# name, unit, description
COLUMNS = [
    ("exposure", None, "raw file name"),
    ("target", None, "OBJECT of the raw header"),
    ("mjd", "d", "modified Julian date (UTC), exposure mean"),
    ("jyear", "yr", "Julian epoch (decimal year)"),
    ("dra", "mas", "companion minus primary, dRA cos(Dec), East positive"),
    ("ddec", "mas", "companion minus primary, dDec, North positive"),
    ("dra_err", "mas", "1-sigma error of dra"),
    ("ddec_err", "mas", "1-sigma error of ddec"),
    ("dra_ddec_corr", None, "correlation coefficient of dra and ddec"),
    ("sep", "mas", "separation"),
    ("sep_err", "mas", "1-sigma error of sep"),
    ("pa", "deg", "position angle, East of North"),
    ("pa_err", "deg", "1-sigma error of pa"),
    ("ellipse_major", "mas", "1-sigma error ellipse, semi-major axis"),
    ("ellipse_minor", "mas", "1-sigma error ellipse, semi-minor axis"),
    ("ellipse_pa", "deg", "error ellipse major-axis PA, East of North"),
    ("flux_ratio", None, "companion/primary flux ratio at 2.2 um, on sky"),
    ("flux_ratio_err", None, "1-sigma error of flux_ratio (statistical and fibre pointing)"),
    ("flux_ratio_err_stat", None, "statistical part of flux_ratio_err"),
    ("flux_slope", None, "power-law index of the flux ratio with wavelength"),
    ("chi2_red", None, "reduced chi-square of the best fit"),
    ("ndata", None, "number of data points fitted"),
    ("flag", None, "quality bit mask (FLAGS in the metadata); 0 = good"),
    ("runner_up_dchi2", None, "chi-square of the runner-up minimum minus the best"),
    ("primary_dra", "mas", "primary minus science pointing, East (NaN if not calibrated)"),
    ("primary_ddec", "mas", "primary minus science pointing, North (NaN if not calibrated)"),
    ("primary_dra_err", "mas", "1-sigma error of primary_dra"),
    ("primary_ddec_err", "mas", "1-sigma error of primary_ddec"),
    ("error_source", None, "fit or bootstrap: which covariance the errors are"),
    ("setup", None, "spectrometer set-up"),
    ("polmode", None, "polarisation mode"),
]
_FROM_ATTR = {"ellipse_major": "ellipse_semi_major", "ellipse_minor": "ellipse_semi_minor",
              "ellipse_pa": "ellipse_pa_deg"}


def row_from_binary(attrs: dict) -> dict:
    """One table row from a ``binary`` product's attributes."""
    from astropy.time import Time
    row = {}
    for name, unit, _ in COLUMNS:
        if name == "jyear":
            continue
        v = attrs.get(_FROM_ATTR.get(name, name), None)
        if name in ("exposure", "target", "error_source", "setup", "polmode"):
            row[name] = "" if v is None else str(v)
        elif name in ("ndata", "flag"):
            row[name] = int(v) if v is not None else -1
        else:
            row[name] = float(v) if v is not None else math.nan
    mjd = row["mjd"]
    row["jyear"] = (float(Time(mjd, format="mjd", scale="utc").jyear) if np.isfinite(mjd)
                    else math.nan)
    return row


def config_hash(keys) -> str:
    """SHA-256 (16 hex digits) of the sorted product content keys."""
    return hashlib.sha256(json.dumps(sorted(keys)).encode()).hexdigest()[:16]


def astrometry_table(rows, *, code_version: str, config: str, flag_doc: str = ""):
    """Rows (dicts from :func:`row_from_binary`) -> astropy Table sorted by mjd."""
    from astropy.table import Table
    rows = sorted(rows, key=lambda r: (r["mjd"], r["exposure"]))
    cols, names = [], []
    for name, unit, desc in COLUMNS:
        values = [r[name] for r in rows]
        dtype = str if name in ("exposure", "target", "error_source", "setup", "polmode") else (
            np.int64 if name in ("ndata", "flag") else np.float64)
        cols.append(np.array(values, dtype=dtype) if values else np.array([], dtype=dtype))
        names.append(name)
    t = Table(cols, names=names)
    for name, unit, desc in COLUMNS:
        t[name].unit = unit
        t[name].description = desc
    t.meta.update({"CODEVER": code_version, "CFGHASH": config, "CONVENT": CONVENTIONS,
                   "FLAGS": flag_doc, "NROWS": len(t)})
    return t


def write_astrometry(table, workdir) -> dict:
    """Write ``WORK/astrometry.{ecsv,fits,csv}`` atomically; returns the paths by format."""
    import os
    import warnings
    workdir = Path(workdir)
    workdir.mkdir(parents=True, exist_ok=True)
    paths = {}
    for ext, fmt in (("ecsv", "ascii.ecsv"), ("fits", "fits"), ("csv", "ascii.csv")):
        final = workdir / f"astrometry.{ext}"
        tmp = workdir / f".astrometry.{os.getpid()}.tmp.{ext}"
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")       # long FITS strings go to CONTINUE cards
            table.write(tmp, format=fmt, overwrite=True)
        os.replace(tmp, final)
        paths[ext] = str(final)
    return paths
