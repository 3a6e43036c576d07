# SPDX-License-Identifier: BSD-3-Clause
"""A small, independent writer of raw FITS files following docs/raw_format.md.

Used by the engine, inventory and raw-reader tests; it shares no code with the
reduction (it writes with astropy directly from the documented format) and is
deliberately simpler than the simulator: detector frames are bias + dark +
Gaussian read noise with optional hot and dead pixels, no sky.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.time import Time

SETUP_NX = {"low": 24, "medium": 256}   # calib/instrument.toml [setups.*].n_x
N_Y = 208                               # calib/instrument.toml [detectors.science].n_y
FT_NWAVE = 6                            # calib/instrument.toml [fringe_tracker].n_wave


def detector_frames(rng, nframe, shape, *, bias=1000.0, dark_adu_s=0.025, dit=1.0,
                    read_noise_adu=6.0, hot=(), hot_adu_s=500.0, dead=(), dead_value=0):
    """Frames (nframe, *shape) uint16: bias + Poisson dark + Gaussian read noise, ADU."""
    rate = np.full(shape, dark_adu_s)
    for p in hot:
        rate[p] = hot_adu_s
    mean = bias + rate * dit
    frames = rng.poisson(rate * dit, size=(nframe, *shape)) + bias
    frames = frames + rng.normal(0.0, read_noise_adu, size=(nframe, *shape))
    frames = np.clip(np.rint(frames), 0, 65535)
    for p in dead:
        frames[(slice(None), *p)] = dead_value
    return frames.astype(np.uint16), mean


def write_raw(path, kind="dark", *, rng, setup="low", polmode="joint", dit=1.0, nframe=4,
              n_ft=40, ft_period=0.001, mjd=61000.1, expno=1, obj=None, lamptel=0,
              caldiam=0.5, hot=(), dead=(), header_extra=None, sci=None, ft=None,
              read_noise_adu=6.0, bias=1000.0):
    """Write one raw exposure; returns the path. ``header_extra`` overrides keywords
    (value None deletes the keyword)."""
    path = Path(path)
    n_x = SETUP_NX[setup]
    if sci is None:
        sci, _ = detector_frames(rng, nframe, (N_Y, n_x), dit=dit, hot=hot, dead=dead,
                                 read_noise_adu=read_noise_adu, bias=bias)
    if ft is None:
        ft = np.clip(np.rint(500 + rng.normal(0, 1.0, size=(n_ft, 24, FT_NWAVE))), 0, 65535)
        ft = ft.astype(np.uint16)
    t = Time(mjd, format="mjd", scale="utc")
    on_sky = kind in ("sky", "calibrator", "science")
    h = fits.Header()
    h["DATE-OBS"] = t.isot
    h["MJD-OBS"] = float(mjd)
    h["EXPTIME"] = float(nframe * dit)
    h["OBJECT"] = obj or {"dark": "DARK", "sky": "SKY", "science": "HD 0001",
                          "calibrator": "HD 0002"}.get(kind, "LAMP")
    h["RA"], h["DEC"], h["RADESYS"] = 150.0, -30.0, "ICRS"
    h["TELESCOP"], h["INSTRUME"] = "KESSA-4T", "FOURFOLD"
    h["FRAMEKND"], h["SPECSET"], h["POLMODE"] = kind, setup, polmode
    h["SCDIT"], h["NFRAME"], h["FTPERIOD"] = float(dit), int(nframe), float(ft_period)
    h["LAMPTEL"] = int(lamptel)
    for i, st in enumerate(("K0", "K1", "K2", "K3")):
        h[f"STATION{i + 1}"] = st
    h["FTOBJECT"] = "HD 0003" if on_sky else "NONE"
    h["FTRA"], h["FTDEC"] = 150.001, -30.001
    if kind == "calibrator":
        h["CALDIAM"], h["CALDIAME"] = float(caldiam), 0.05
    h["AMBTEMP"], h["AMBPRES"], h["AMBHUM"] = 8.0, 780.0, 20.0
    h["SEEING"], h["COHTIME"] = 0.7, 4.0
    h["EXPNO"] = int(expno)
    if kind == "lamp-scan":
        h["SCANRATE"] = 1e-6
    for k, v in (header_extra or {}).items():
        if v is None:
            del h[k]
        else:
            h[k] = v
    hdus = [fits.PrimaryHDU(header=h)]
    img = fits.ImageHDU(data=np.asarray(sci, np.uint16), name="SCI_PIX")
    img.header["BUNIT"] = "adu"
    hdus.append(img)
    start = np.arange(nframe) * dit
    hdus.append(fits.BinTableHDU.from_columns([
        fits.Column(name="T_START", format="D", unit="s", array=start),
        fits.Column(name="T_EXP", format="D", unit="s", array=np.full(nframe, dit))],
        name="SCI_TIME"))
    n_ft = ft.shape[0]
    hdus.append(fits.BinTableHDU.from_columns([
        fits.Column(name="TIME", format="D", unit="s", array=(np.arange(n_ft) + 1) * ft_period),
        fits.Column(name="COUNTS", format=f"{24 * FT_NWAVE}I", dim=f"({FT_NWAVE},24)",
                    unit="adu", bzero=32768, array=ft)], name="FT_PIX"))
    if kind in ("lamp-scan", "sky", "calibrator", "science"):
        n_m = 20
        hdus.append(fits.BinTableHDU.from_columns([
            fits.Column(name="TIME", format="D", unit="s", array=np.linspace(0, nframe * dit, n_m)),
            fits.Column(name="PATH", format="4D", unit="m", array=rng.normal(0, 1e-7, (n_m, 4)))],
            name="METROLOGY"))
    fits.HDUList(hdus).writeto(path, overwrite=True)
    return path


def small_night(root, rng, *, setup="low", dits=(1.0,), sci_dit=1.0):
    """A minimal night: darks per DIT, flat, 4 lamp-beam, 1 lamp-scan, 1 calibrator,
    2 science, all in one set-up. Returns the directory."""
    root = Path(root)
    root.mkdir(parents=True, exist_ok=True)
    n = 0

    def nxt():
        nonlocal n
        n += 1
        return n
    for dit in dits:
        write_raw(root / f"dark_{dit:g}.fits", "dark", rng=rng, setup=setup, dit=dit,
                  expno=nxt(), mjd=61000.01)
    write_raw(root / "flat.fits", "flat", rng=rng, setup=setup, dit=sci_dit, expno=nxt(),
              mjd=61000.02)
    for t in range(1, 5):
        write_raw(root / f"beam{t}.fits", "lamp-beam", rng=rng, setup=setup, dit=sci_dit,
                  lamptel=t, expno=nxt(), mjd=61000.03)
    write_raw(root / "scan.fits", "lamp-scan", rng=rng, setup=setup, dit=sci_dit, expno=nxt(),
              mjd=61000.04)
    write_raw(root / "cal.fits", "calibrator", rng=rng, setup=setup, dit=sci_dit, expno=nxt(),
              mjd=61000.10)
    for i in range(2):
        write_raw(root / f"sci{i}.fits", "science", rng=rng, setup=setup, dit=sci_dit,
                  expno=nxt(), mjd=61000.11 + 0.01 * i)
    return root
