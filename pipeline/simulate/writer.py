# SPDX-License-Identifier: BSD-3-Clause
"""Write one raw exposure (docs/raw_format.md), streaming the science cube in chunks.

The file is written under a temporary name and renamed when complete. The
science cube's data unit is streamed chunk by chunk (big-endian 16-bit with
BZERO = 32768), so memory stays bounded whatever the number of frames; the
tables follow it.
"""

from __future__ import annotations

import io
import os
from pathlib import Path

import numpy as np
from astropy.io import fits

__all__ = ["write_exposure"]

_BLOCK = 2880


def _pad(fh, n_bytes: int):
    rest = (-n_bytes) % _BLOCK
    if rest:
        fh.write(b"\0" * rest)


def _tables(sci_time, ft_time, ft_counts, metrology) -> bytes:
    n_out, n_wave = ft_counts.shape[1:]
    hdus = [fits.PrimaryHDU(),
            fits.BinTableHDU.from_columns([
                fits.Column("T_START", "D", unit="s", array=sci_time[0]),
                fits.Column("T_EXP", "D", unit="s", array=sci_time[1])], name="SCI_TIME"),
            fits.BinTableHDU.from_columns([
                fits.Column("TIME", "D", unit="s", array=ft_time),
                fits.Column("COUNTS", f"{n_out * n_wave}I", unit="adu", bzero=32768,
                            dim=f"({n_wave},{n_out})", array=ft_counts)], name="FT_PIX")]
    if metrology is not None:
        hdus.append(fits.BinTableHDU.from_columns([
            fits.Column("TIME", "D", unit="s", array=metrology[0]),
            fits.Column("PATH", "4D", unit="m", array=metrology[1])], name="METROLOGY"))
    bio = io.BytesIO()
    fits.HDUList(hdus).writeto(bio)
    raw = bio.getvalue()
    return raw[_BLOCK:]             # drop the dummy primary (header only, one block)


def write_exposure(path, cards, shape, chunks, sci_time, ft_time, ft_counts, metrology=None):
    """Write one raw FITS file.

    Parameters
    ----------
    path : path of the file to write
    cards : list of (keyword, value, comment), the primary header
    shape : (n_frame, n_y, n_x) of the science cube
    chunks : iterable of uint16 arrays (frames, n_y, n_x) filling the cube in order
    sci_time : (t_start, t_exp), arrays (n_frame,), s since DATE-OBS
    ft_time : ndarray (n_ft,), s, end of each fringe-tracker frame since DATE-OBS
    ft_counts : ndarray uint16 (n_ft, n_output, n_wave), ADU
    metrology : (time (n,), path (n, 4) m) or None
    """
    path = Path(path)
    tmp = path.with_name(path.name + ".part")
    prim = fits.PrimaryHDU()
    for key, value, comment in cards:
        prim.header[key] = (value, comment)
    img = fits.Header([("XTENSION", "IMAGE", "image extension"), ("BITPIX", 16), ("NAXIS", 3),
                       ("NAXIS1", shape[2]), ("NAXIS2", shape[1]), ("NAXIS3", shape[0]),
                       ("PCOUNT", 0), ("GCOUNT", 1), ("BSCALE", 1), ("BZERO", 32768),
                       ("EXTNAME", "SCI_PIX"), ("BUNIT", "adu", "raw detector units")])
    written = 0
    with open(tmp, "wb") as fh:
        fh.write(prim.header.tostring().encode("ascii"))
        fh.write(img.tostring().encode("ascii"))
        for chunk in chunks:
            chunk = np.asarray(chunk, np.uint16)
            data = (chunk ^ np.uint16(0x8000)).astype(">u2").tobytes()
            fh.write(data)
            written += len(data)
        expected = 2 * int(np.prod(shape))
        if written != expected:
            raise RuntimeError(f"{path}: wrote {written} bytes of SCI_PIX, expected {expected}")
        _pad(fh, written)
        fh.write(_tables(sci_time, ft_time, ft_counts, metrology))
    os.replace(tmp, path)
