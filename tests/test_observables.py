# SPDX-License-Identifier: BSD-3-Clause
"""average -> calibrate -> OIFITS on synthetic products drawn from a known model:
an instrumental transfer function and phase zero-point common to a uniform-disk
calibrator and an unresolved science star must calibrate out (V2 = 1, closure
and referenced phases = 0 within errors)."""

import json
import warnings
from types import SimpleNamespace

import numpy as np
import pytest

from pipeline.errors import MissingCalibration
from pipeline.numerics.averaging import BASELINES
from pipeline.numerics.transfer import uniform_disk_vis2
from pipeline.observables import (OutputsView, array_for, average_product, calibrate_product,
                                  exposure_uvw, header_facts, oifits_observations)
from pipeline.oifits import write_oifits

I = np.array([b[0] for b in BASELINES])
J = np.array([b[1] for b in BASELINES])
WAVE = np.linspace(2.0e-6, 2.4e-6, 5)
TAU = np.linspace(0.6, 0.9, 6)[:, None] * np.linspace(0.95, 1.0, 5)   # instrumental |V|
ZP = np.linspace(-2.5, 2.8, 6)[:, None] + 0 * WAVE                    # instrumental phase


class View:
    """A product-like mapping for tests (``view["x"]``, ``.attrs``, ``in``)."""

    def __init__(self, arrays, attrs=None, path="mem"):
        self.arrays, self.attrs, self.path = arrays, dict(attrs or {}), path

    def __getitem__(self, k):
        return self.arrays[k]

    def __contains__(self, k):
        return k in self.arrays


def _header(kind, obj, mjd, diam=np.nan):
    h = {"OBJECT": obj, "FRAMEKND": kind, "SPECSET": "low", "POLMODE": "joint",
         "RA": 150.0, "DEC": -30.0, "MJD-OBS": mjd, "DATE-OBS": "2026-12-01T02:00:00.000",
         "STATION1": "K0", "STATION2": "K1", "STATION3": "K2", "STATION4": "K3"}
    if kind == "calibrator":
        h.update(CALDIAM=diam, CALDIAME=0.05)
    return h


def _exposure(rng, instrument, header, diam_mas=0.0, n_frame=80, flux=4000.0):
    facts = header_facts(header)
    uvw = exposure_uvw(instrument, facts, header["MJD-OBS"] + 40 / 86400)
    vis = (uniform_disk_vis2(uvw[:, :1], uvw[:, 1:2], WAVE, diam_mas)[0] if diam_mas
           else np.ones((6, WAVE.size)))
    f = flux * rng.uniform(0.7, 1.3, (n_frame, 1, 4, 1)) * np.ones(WAVE.size)
    loss = rng.uniform(0.8, 1.0, (n_frame, 6, WAVE.size))
    c = (np.sqrt(f[:, :, I] * f[:, :, J]) * (TAU * vis * np.exp(1j * ZP))[None, None]
         * loss[:, None])
    s2 = 0.5 * (f[:, :, I] + f[:, :, J]) + 4 * 144.0
    c = c + np.sqrt(s2) * (rng.normal(size=c.shape) + 1j * rng.normal(size=c.shape))
    fm = f + rng.normal(size=f.shape) * np.sqrt(f)
    valid = np.ones((n_frame, 6), bool)
    valid[rng.choice(n_frame, 5, replace=False)] = False
    ext = View({"flux": fm, "coherent_var": s2, "wave": WAVE,
                "frame_start": np.arange(n_frame) * 1.0, "frame_exp": np.ones(n_frame)})
    ref = View({"coherent_ref": c, "frame_valid": valid, "contrast_loss": loss})
    return ext, ref


def _average(rng, instrument, kind, obj, mjd, diam=np.nan):
    h = _header(kind, obj, mjd, diam)
    ext, ref = _exposure(rng, instrument, h, 0.0 if kind == "science" else diam)
    out = average_product(ext, ref, h, instrument, label=f"{obj}-{mjd}", n_boot=100, seed=1)
    view = OutputsView(out, path=f"{obj}.h5")
    view.attrs["label"] = f"{obj}-{mjd}"
    return view


def test_point_source_calibrates_to_unity(rng, instrument, tmp_path):
    cal1 = _average(rng, instrument, "calibrator", "CAL A", 61000.10, diam=1.2)
    sci = _average(rng, instrument, "science", "SCI B", 61000.15)
    cal2 = _average(rng, instrument, "calibrator", "CAL A", 61000.20, diam=1.2)
    # raw V2 carries the instrumental transfer function (~TAU^2), far from 1
    assert np.all(sci["vis2"] < 0.85)
    out = calibrate_product(sci, [cal2, cal1])
    v = OutputsView(out)
    # unresolved star: V2 = 1, phases 0, within 4 sigma (30 values each; Gaussian noise)
    assert np.all(np.abs(v["vis2"] - 1) < 4 * v["vis2_err"])
    assert np.all(np.abs(v["t3phi"]) < 4 * v["t3phi_err"])
    assert np.all(np.abs(v["visphi"]) < 4 * v["visphi_err"])
    assert np.all(np.abs(v["visamp"] - 1) < 4 * v["visamp_err"])
    assert v["vis2_cov"].shape == (1, 6, 5, 5)
    # the covariance's diagonal is the propagated variance (same first-order model)
    np.testing.assert_allclose(np.diagonal(v["vis2_cov"], axis1=-2, axis2=-1),
                               v["vis2_err"] ** 2, rtol=1e-6)
    np.testing.assert_allclose(np.diagonal(v["visphi_cov"], axis1=-2, axis2=-1),
                               v["visphi_err"] ** 2, rtol=1e-6)
    assert json.loads(v.attrs["calibrators"]) == ["CAL A-61000.1", "CAL A-61000.2"]
    # exported and read back by the independent oifits package
    import oifits
    path = write_oifits(tmp_path / "sci.fits", oifits_observations(v), array_for(v, instrument))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        data = oifits.open(str(path), quiet=True)
    np.testing.assert_allclose([r._vis2data for r in data.vis2], v["vis2"][0])
    np.testing.assert_allclose([r.ucoord for r in data.vis2], v["uvw"][:, 0])


def test_missing_calibrator_names_the_exposure(rng, instrument):
    sci = _average(rng, instrument, "science", "SCI B", 61000.15)
    with pytest.raises(MissingCalibration, match=r"FF_x_science.fits: no calibrator.*'low'"):
        calibrate_product(sci, [], science_path="/night/FF_x_science.fits")


def test_average_recipe_contract(rng, instrument, tmp_path):
    """The recipe's run on product-like inputs writes the declared datasets."""
    from recipes import average, calibrate
    h = _header("science", "SCI B", 61000.15)
    ext, ref = _exposure(rng, instrument, h)
    inputs = SimpleNamespace(products={"extract": ext, "reference": ref},
                             raw=[SimpleNamespace(header=h)], instrument=instrument,
                             unit=SimpleNamespace(label="FF_sci"), workdir=tmp_path)
    out = average.run(inputs, average.AverageParams(n_boot=50))
    for name in ("vis2", "vis2_err", "t3phi", "t3phi_err", "visamp", "visphi", "flux",
                 "uvw", "wave"):
        assert name in out
    assert out["vis2"].axes == ("pol", "baseline", "wave")
    assert out["t3phi"].unit == "rad"
    with pytest.raises(ValueError, match="n_boot"):
        average.AverageParams(n_boot=1)
    with pytest.raises(ValueError, match="interpolation"):
        calibrate.CalibrateParams(interpolation="cubic")
