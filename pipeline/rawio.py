# SPDX-License-Identifier: BSD-3-Clause
"""Lazy, validated access to one raw FITS exposure (format: docs/raw_format.md).

Only the primary header is read on opening. Pixel data are memory-mapped and
exposed as dask arrays chunked by frames, read through a small picklable
accessor (so the processes and distributed schedulers can ship them), never
loaded whole. A file's identity for content keys is (path, size, mtime, hash
of the header text): pixels are never hashed.
"""

from __future__ import annotations

import hashlib
import os
import warnings
from functools import cached_property, lru_cache
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.time import Time

from .errors import BadInput

__all__ = ["RawExposure", "FRAME_KINDS", "ON_SKY_KINDS", "REQUIRED"]

FRAME_KINDS = ("dark", "flat", "pixel-flat", "lamp-beam", "lamp-scan", "sky", "calibrator",
               "science")
ON_SKY_KINDS = ("sky", "calibrator", "science")

# Required primary keywords and their types, per frame kind (docs/raw_format.md).
_COMMON = {"DATE-OBS": str, "MJD-OBS": float, "EXPTIME": float, "OBJECT": str,
           "FRAMEKND": str, "SPECSET": str, "POLMODE": str, "SCDIT": float, "NFRAME": int,
           "FTPERIOD": float, "LAMPTEL": int, "EXPNO": int}
_ON_SKY = {"RA": float, "DEC": float, "FTOBJECT": str, "FTRA": float, "FTDEC": float,
           **{f"STATION{i}": str for i in range(1, 5)}}
REQUIRED = {
    "dark": _COMMON, "flat": _COMMON, "pixel-flat": _COMMON, "lamp-beam": _COMMON,
    "lamp-scan": {**_COMMON, "SCANRATE": float},
    "sky": {**_COMMON, **_ON_SKY},
    "science": {**_COMMON, **_ON_SKY},
    "calibrator": {**_COMMON, **_ON_SKY, "CALDIAM": float, "CALDIAME": float},
}
_OPTIONAL_FLOATS = ("AMBTEMP", "AMBPRES", "AMBHUM", "SEEING", "COHTIME")
_CHUNK_BYTES = 32 * 2**20   # science frames per dask chunk: about this many bytes of float32


@lru_cache(maxsize=4)
def _instrument(path=None):
    from .instrument import load_instrument
    return load_instrument() if path is None else load_instrument(path)


def _typed(path, header, key, typ):
    if key not in header:
        raise BadInput(path, f"missing header keyword {key}")
    value = header[key]
    if typ is float and isinstance(value, (int, np.integer)) and not isinstance(value, bool):
        value = float(value)
    if typ is int and isinstance(value, bool) or not isinstance(value, typ):
        raise BadInput(path, f"header keyword {key} should be {typ.__name__}, found "
                             f"{type(value).__name__} {value!r}")
    return value


class _MemmapBlock:
    """Picklable array-like over one memory-mapped FITS data block.

    ``dtype`` is the on-disk (big-endian) record or pixel type; ``field`` picks a
    table column; ``zero``/``scale`` undo BZERO/BSCALE or TZERO/TSCAL.
    """

    def __init__(self, path, offset, disk_dtype, shape, out_shape, *, field=None, zero=0.0,
                 scale=1.0):
        self.path, self.offset, self.disk_dtype = str(path), int(offset), disk_dtype
        self.disk_shape, self.shape = tuple(shape), tuple(out_shape)
        self.field, self.zero, self.scale = field, float(zero), float(scale)
        self.dtype = np.dtype(np.float32 if field in (None, "COUNTS") else np.float64)
        self.ndim = len(self.shape)

    def __getitem__(self, index):
        index = index if isinstance(index, tuple) else (index,)
        mm = np.memmap(self.path, dtype=self.disk_dtype, mode="r", offset=self.offset,
                       shape=self.disk_shape)
        rows = mm[index[0]]
        data = rows[self.field] if self.field else rows
        out = np.asarray(data[(slice(None),) + index[1:]], dtype=self.dtype)
        if self.scale != 1.0:
            out *= self.scale
        if self.zero:
            out += self.zero
        if self.field is None and out.ndim == 3 and out.shape[1:] == self.shape[1:]:
            _check_frames(self.path, out, index[0])
        return out


def _check_frames(path, frames, rows):
    """A whole frame at 0 ADU (dead detector, empty read-out) or at the 16-bit ceiling
    (saturated everywhere) carries no signal: BadInput naming the frame."""
    first = (rows.start or 0) if isinstance(rows, slice) else 0
    flat = frames.reshape(frames.shape[0], -1)
    for what, test in (("0 ADU in every pixel (dead detector or empty read-out)", flat == 0),
                       ("saturated (65535 ADU) in every pixel", flat >= 65535)):
        dead = np.flatnonzero(test.all(axis=1))
        if dead.size:
            raise BadInput(path, f"science frame {first + dead[0]} is {what}")


@lru_cache(maxsize=256)
def _layout_of(path: str, size: int, mtime_ns: int) -> dict:
    """Headers and data locations of every HDU of ``path``; checks the file is complete.
    Kept per process by path, size and modification time: the units of one night open
    the same exposures again (parsing the headers costs ~50 ms a file). The headers are
    shared, so they are read-only."""
    layout = {}
    try:
        with warnings.catch_warnings():   # truncation is reported below as BadInput
            warnings.simplefilter("ignore")
            hdul = fits.open(path, memmap=True, lazy_load_hdus=False,
                             do_not_scale_image_data=True)
        with hdul:
            for i, hdu in enumerate(hdul):
                info = hdu.fileinfo()
                name = "PRIMARY" if i == 0 else hdu.header.get("EXTNAME", f"HDU{i}")
                cols = hdu.columns if isinstance(hdu, fits.BinTableHDU) else None
                layout[name] = (hdu.header.copy(), info["datLoc"], info["datSpan"], cols)
    except BadInput:
        raise
    except Exception as exc:  # astropy raises OSError, ValueError, TypeError...
        raise BadInput(path, f"not a readable FITS file ({type(exc).__name__}: "
                             f"{exc})") from None
    if not layout:
        raise BadInput(path, "empty FITS file")
    end = max(loc + span for _, loc, span, _ in layout.values())
    if end > size:
        raise BadInput(path, f"truncated: the headers announce {end} bytes, "
                             f"the file has {size}")
    return layout


class RawExposure:
    """One raw exposure, opened lazily.

    Parameters
    ----------
    path : str or os.PathLike
    instrument : pipeline.instrument.Instrument, optional (default model if None)

    Raises
    ------
    BadInput
        Naming the file, on opening, when it is not a readable FITS file, is
        truncated, or its header is invalid (missing keyword, wrong type,
        unknown frame kind or set-up, non-positive DIT, inconsistent dates).
    """

    def __init__(self, path, instrument=None):
        self.path = str(Path(path).resolve())
        self._instrument = instrument
        st = self._stat()
        self._size, self._mtime_ns = st.st_size, st.st_mtime_ns
        self._layout = _layout_of(self.path, self._size, self._mtime_ns)
        self.header = self._validate(self._layout["PRIMARY"][0])

    # -- opening and validation -------------------------------------------------
    def _stat(self):
        try:
            return os.stat(self.path)
        except OSError as exc:
            raise BadInput(self.path, f"cannot read file: {exc.strerror}") from None

    @property
    def instrument(self):
        return self._instrument if self._instrument is not None else _instrument()

    def _validate(self, header):
        p = self.path
        kind = header.get("FRAMEKND")
        if kind is None:
            raise BadInput(p, "missing header keyword FRAMEKND")
        if kind not in FRAME_KINDS:
            raise BadInput(p, f"header keyword FRAMEKND={kind!r} is not one of {FRAME_KINDS}")
        values = {k: _typed(p, header, k, t) for k, t in REQUIRED[kind].items()}
        setups = self.instrument.setups
        if values["SPECSET"] not in setups:
            raise BadInput(p, f"header keyword SPECSET={values['SPECSET']!r} is not a known "
                              f"set-up {sorted(setups)}")
        if values["POLMODE"] not in setups[values["SPECSET"]].polarisation:
            raise BadInput(p, f"header keyword POLMODE={values['POLMODE']!r} is not offered by "
                              f"set-up {values['SPECSET']!r}")
        for key in ("SCDIT", "FTPERIOD"):
            if not np.isfinite(values[key]) or values[key] <= 0:
                raise BadInput(p, f"header keyword {key}={values[key]!r} must be positive")
        if values["NFRAME"] < 1:
            raise BadInput(p, f"header keyword NFRAME={values['NFRAME']} must be at least 1")
        if kind == "lamp-beam" and not 1 <= values["LAMPTEL"] <= 4:
            raise BadInput(p, f"header keyword LAMPTEL={values['LAMPTEL']} must be 1-4 for a "
                              "lamp-beam exposure")
        if kind == "calibrator" and not (values["CALDIAM"] >= 0 and values["CALDIAME"] >= 0):
            raise BadInput(p, "header keywords CALDIAM/CALDIAME must be non-negative")
        try:
            with warnings.catch_warnings():     # dates beyond the leap-second table
                warnings.simplefilter("ignore")
                t = Time(values["DATE-OBS"], format="isot", scale="utc")
        except ValueError:
            raise BadInput(p, f"header keyword DATE-OBS={values['DATE-OBS']!r} is not an "
                              "ISO 8601 date") from None
        if not 1990 < t.jyear < 2200:
            raise BadInput(p, f"header keyword DATE-OBS={values['DATE-OBS']!r} is not a "
                              "plausible date")
        if t.mjd > Time.now().mjd + 1.0:
            raise BadInput(p, f"header keyword DATE-OBS={values['DATE-OBS']!r} is in the future")
        if abs(t.mjd - values["MJD-OBS"]) * 86400.0 > 1.0:
            raise BadInput(p, f"header keywords DATE-OBS={values['DATE-OBS']!r} and "
                              f"MJD-OBS={values['MJD-OBS']} disagree by more than 1 s")
        for key in _OPTIONAL_FLOATS:
            if key in header:
                _typed(p, header, key, float)
        for ext in ("SCI_PIX", "SCI_TIME", "FT_PIX") + (
                ("METROLOGY",) if kind in ON_SKY_KINDS + ("lamp-scan",) else ()):
            if ext not in self._layout:
                raise BadInput(p, f"missing extension {ext}")
        return header

    # -- header facts -----------------------------------------------------------
    @property
    def kind(self) -> str:
        return self.header["FRAMEKND"]

    @property
    def setup(self) -> str:
        return self.header["SPECSET"]

    @property
    def polmode(self) -> str:
        return self.header["POLMODE"]

    @property
    def dit(self) -> float:
        return float(self.header["SCDIT"])

    @property
    def nframe(self) -> int:
        return int(self.header["NFRAME"])

    @property
    def mjd(self) -> float:
        return float(self.header["MJD-OBS"])

    @cached_property
    def header_sha256(self) -> str:
        return hashlib.sha256(self.header.tostring().encode("ascii", "replace")).hexdigest()

    def identity(self) -> tuple:
        """(path, size, mtime_ns, sha256 of the primary header text), for content keys."""
        return (self.path, self._size, self._mtime_ns, self.header_sha256)

    def __dask_tokenize__(self):
        return ("RawExposure",) + self.identity()

    def __repr__(self):
        return f"RawExposure({self.path!r}, kind={self.kind!r})"

    def __reduce__(self):
        return (RawExposure, (self.path, self._instrument))

    # -- data -------------------------------------------------------------------
    def _image(self):
        hdr, loc, _, _ = self._layout["SCI_PIX"]
        if hdr.get("BITPIX") != 16 or hdr.get("NAXIS") != 3:
            raise BadInput(self.path, f"SCI_PIX should be a 16-bit (frame, y, x) cube, found "
                                      f"BITPIX={hdr.get('BITPIX')} NAXIS={hdr.get('NAXIS')}")
        shape = (hdr["NAXIS3"], hdr["NAXIS2"], hdr["NAXIS1"])
        if shape[0] != self.nframe:
            raise BadInput(self.path, f"SCI_PIX has {shape[0]} frames, NFRAME says {self.nframe}")
        n_x = self.instrument.setups[self.setup].n_x
        if shape[2] != n_x:
            raise BadInput(self.path, f"SCI_PIX has {shape[2]} columns, set-up {self.setup!r} "
                                      f"reads {n_x}")
        n_y = getattr(self.instrument.detectors.get("science"), "n_y", 0)
        if n_y and shape[1] != n_y:
            raise BadInput(self.path, f"SCI_PIX has {shape[1]} rows, the detector has {n_y}")
        return _MemmapBlock(self.path, loc, np.dtype(">i2"), shape, shape,
                            zero=hdr.get("BZERO", 0.0), scale=hdr.get("BSCALE", 1.0))

    def science_pixels(self, frames_per_chunk: int | None = None):
        """Science frames, dask array (frame, y, x), float32, ADU, chunked by frames."""
        import dask.array as da
        block = self._image()
        if frames_per_chunk is None:
            frames_per_chunk = max(1, _CHUNK_BYTES // (4 * block.shape[1] * block.shape[2]))
        from dask.base import tokenize
        return da.from_array(block, chunks=(frames_per_chunk, -1, -1), asarray=False,
                             name="sci-pix-" + tokenize(self.identity(), frames_per_chunk))

    def _table(self, ext):
        if ext not in self._layout:
            raise BadInput(self.path, f"missing extension {ext}")
        hdr, loc, _, cols = self._layout[ext]
        if cols is None:
            raise BadInput(self.path, f"extension {ext} should be a binary table")
        native = cols.dtype
        fields = [(n, native[n].base.newbyteorder(">"), native[n].shape) for n in native.names]
        return hdr, loc, np.dtype(fields), cols

    def _column(self, ext, name, *, dask_rows=None):
        hdr, loc, dtype, cols = self._table(ext)
        if name not in cols.names:
            raise BadInput(self.path, f"extension {ext} has no column {name}")
        if dtype.itemsize != hdr["NAXIS1"]:
            raise BadInput(self.path, f"extension {ext}: row of {hdr['NAXIS1']} bytes, columns "
                                      f"describe {dtype.itemsize}")
        n_row = hdr["NAXIS2"]
        col = cols[name]
        shape = (n_row,) + dtype[name].shape
        block = _MemmapBlock(self.path, loc, dtype, (n_row,), shape, field=name,
                             zero=col.bzero or 0.0, scale=col.bscale or 1.0)
        if dask_rows is None:
            return block[slice(None)]
        import dask.array as da
        from dask.base import tokenize
        return da.from_array(block, chunks=(dask_rows,) + (-1,) * (len(shape) - 1),
                             asarray=False, name=f"{ext}-{name}-" + tokenize(self.identity()))

    def ft_counts(self, rows_per_chunk: int | None = None):
        """Fringe-tracker counts, (ft_frame, output, ft_wave), float32, ADU.

        numpy when ``rows_per_chunk`` is None, else a dask array chunked by frames."""
        counts = self._column("FT_PIX", "COUNTS", dask_rows=rows_per_chunk)
        n_out = self.instrument.combiner.n_output
        n_wave = self.instrument.fringe_tracker.n_wave
        if counts.ndim != 3 or counts.shape[1:] != (n_out, n_wave):
            raise BadInput(self.path, f"FT_PIX COUNTS should be (frame, {n_out}, {n_wave}), "
                                      f"found {counts.shape}")
        return counts

    def _finite(self, ext, name, values):
        bad = ~np.isfinite(values)
        if bad.any():
            rows = np.flatnonzero(bad.reshape(bad.shape[0], -1).any(axis=1))
            raise BadInput(self.path, f"extension {ext} column {name} has {rows.size} row(s) "
                                      f"with NaN or infinite values (first: row {rows[0]})")
        return values

    def ft_time(self) -> np.ndarray:
        """End time of each fringe-tracker frame, (ft_frame,), s since DATE-OBS."""
        return self._finite("FT_PIX", "TIME", self._column("FT_PIX", "TIME"))

    def frame_times(self) -> tuple[np.ndarray, np.ndarray]:
        """(start, exposure) of each science frame, (frame,) each, s since DATE-OBS."""
        start, exp = (self._finite("SCI_TIME", c, self._column("SCI_TIME", c))
                      for c in ("T_START", "T_EXP"))
        if start.shape[0] != self.nframe:
            raise BadInput(self.path, f"SCI_TIME has {start.shape[0]} rows, NFRAME says "
                                      f"{self.nframe}")
        return start, exp

    def metrology(self) -> tuple[np.ndarray, np.ndarray]:
        """(time (sample,) s since DATE-OBS, path (sample, 4) m)."""
        time, path = (self._finite("METROLOGY", c, self._column("METROLOGY", c))
                      for c in ("TIME", "PATH"))
        if path.ndim != 2 or path.shape[1] != 4:
            raise BadInput(self.path, f"METROLOGY PATH should be (sample, 4), found {path.shape}")
        return time, path
