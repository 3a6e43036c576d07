# SPDX-License-Identifier: BSD-3-Clause
"""OIFITS v2 export: read back by the independent ``oifits`` package (PyPI) and by
astropy; the standard's keywords and units asserted one by one.

Standard: Duvert, Young & Hummel 2017, A&A 597, A8 (OIFITS v2). Tables 2 (main
header), 4 (OI_ARRAY), 6 (OI_VIS2) and 7 (OI_VIS) were checked against the
published tables; the OI_TARGET, OI_WAVELENGTH, OI_T3 and OI_FLUX details are
quoted from memory of the same paper.
"""

import warnings

import numpy as np
import pytest
from astropy.io import fits

from pipeline.geometry import uvw_from_enu
from pipeline.oifits import BASELINES, TRIANGLES, OiArray, OiObservation, write_oifits


def _obs(rng, instrument, *, target="HD 0001", mjd=61000.25, insname="FOURFOLD_low_joint",
         category="SCI"):
    nw = 7
    wave = np.linspace(2.0e-6, 2.4e-6, nw)
    uvw = uvw_from_enu(instrument.baseline_enu_m, 0.4, np.deg2rad(-25.0),
                       np.deg2rad(instrument.site.latitude_deg))[0]
    vis2 = rng.uniform(0.2, 1.0, (6, nw))
    vis2[2, 3] = np.nan                      # a flagged value
    return OiObservation(
        target=target, ra_deg=123.4, dec_deg=-25.0, date_obs="2026-12-01T03:04:05.000",
        mjd=mjd, int_time_s=60.0, insname=insname, wave_m=wave, band_m=np.full(nw, 2e-8),
        uvw_m=uvw, vis2=vis2, vis2_err=rng.uniform(0.01, 0.02, (6, nw)),
        visamp=rng.uniform(0.4, 1, (6, nw)), visamp_err=np.full((6, nw), 0.01),
        visphi_rad=rng.uniform(-3, 3, (6, nw)), visphi_err_rad=np.full((6, nw), 0.02),
        t3amp=rng.uniform(0.1, 1, (4, nw)), t3amp_err=np.full((4, nw), 0.01),
        t3phi_rad=rng.uniform(-3, 3, (4, nw)), t3phi_err_rad=np.full((4, nw), 0.03),
        flux=rng.uniform(1e3, 2e3, (4, nw)), flux_err=np.full((4, nw), 10.0),
        category=category)


@pytest.fixture
def written(tmp_path, rng, instrument):
    obs = _obs(rng, instrument)
    array = OiArray.from_instrument(instrument, ["K0", "K1", "K2", "K3"])
    path = write_oifits(tmp_path / "oifits" / "exp.fits", [obs], array)
    return path, obs, array


def test_read_back_by_oifits_package(written):
    """Values read by the independent `oifits` package equal ours."""
    import oifits
    path, obs, _ = written
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        data = oifits.open(str(path), quiet=True)
    assert len(data.vis2) == 6 and len(data.t3) == 4 and len(data.vis) == 6
    assert len(data.flux) == 4
    for n, row in enumerate(data.vis2):
        np.testing.assert_allclose(row._vis2data, obs.vis2[n])
        np.testing.assert_allclose(row._vis2err, obs.vis2_err[n])
        assert row.ucoord == pytest.approx(obs.uvw_m[n, 0])
        assert row.vcoord == pytest.approx(obs.uvw_m[n, 1])
        # station names: baseline (i, j) joins K_i and K_j
        assert [s.sta_name for s in row.station] == [f"K{i}" for i in BASELINES[n]]
        np.testing.assert_allclose(row.wavelength.eff_wave, obs.wave_m, rtol=1e-7)  # float32
    assert bool(data.vis2[2].flag[3]) and not data.vis2[2].flag[2]
    for n, row in enumerate(data.t3):
        np.testing.assert_allclose(row._t3phi, np.rad2deg(obs.t3phi_rad[n]))
        np.testing.assert_allclose(row._t3amp, obs.t3amp[n])
        a, b, c = TRIANGLES[n]
        assert row.u1coord == pytest.approx(obs.uvw_m[BASELINES.index((a, b)), 0])
        assert row.v2coord == pytest.approx(obs.uvw_m[BASELINES.index((b, c)), 1])
    for n, row in enumerate(data.vis):
        np.testing.assert_allclose(row._visphi, np.rad2deg(obs.visphi_rad[n]))
        np.testing.assert_allclose(row._visamp, obs.visamp[n])
    for n, row in enumerate(data.flux):
        np.testing.assert_allclose(row._fluxdata, obs.flux[n])
    assert data.target[0].target == obs.target
    assert data.target[0].raep0.angle == pytest.approx(123.4)


def test_mandatory_keywords_and_units(written):
    path, obs, array = written
    with fits.open(path) as hdul:
        p = hdul[0].header
        # Table 2 (main header): mandatory keywords
        assert p["CONTENT"] == "OIFITS2"
        for key in ("ORIGIN", "DATE", "DATE-OBS", "TELESCOP", "INSTRUME", "OBSERVER",
                    "OBJECT", "INSMODE"):
            assert key in p and str(p[key]).strip(), key
        assert p["OBJECT"] == obs.target
        assert p["PROCSOFT"].startswith("twinfield ")     # "versioned" software (Table 2)
        assert p["DATE-OBS"].startswith("2026-12-01T03:04")
        names = [h.name for h in hdul[1:]]
        assert names == ["OI_TARGET", "OI_ARRAY", "OI_WAVELENGTH", "OI_VIS2", "OI_VIS",
                         "OI_T3", "OI_FLUX"]

        t = hdul["OI_TARGET"]                       # Table 3 (from memory)
        assert t.header["OI_REVN"] == 2
        for col in ("TARGET_ID", "TARGET", "RAEP0", "DECEP0", "EQUINOX", "RA_ERR", "DEC_ERR",
                    "SYSVEL", "VELTYP", "VELDEF", "PMRA", "PMDEC", "PMRA_ERR", "PMDEC_ERR",
                    "PARALLAX", "PARA_ERR", "SPECTYP"):
            assert col in t.columns.names, col
        assert t.columns["RAEP0"].unit == "deg"
        assert t.columns["DECEP0"].unit == "deg"

        a = hdul["OI_ARRAY"]                        # Table 4
        assert a.header["OI_REVN"] == 2
        assert a.header["ARRNAME"] == array.arrname
        assert a.header["FRAME"] == "GEOCENTRIC"
        for key in ("ARRAYX", "ARRAYY", "ARRAYZ"):
            assert key in a.header
        assert a.columns["STAXYZ"].unit == "m"
        assert a.columns["DIAMETER"].unit == "m"
        assert a.columns["FOV"].unit == "arcsec"
        assert list(a.data["STA_INDEX"]) == [1, 2, 3, 4]    # must be >= 1
        # the station vectors keep the ENU baseline lengths (a rotation)
        xyz = a.data["STAXYZ"]
        np.testing.assert_allclose(np.linalg.norm(xyz[1] - xyz[0]),
                                   np.linalg.norm(np.subtract([46.2, 21.0, 0.3], 0)), rtol=1e-9)
        # and the array centre is the site's geocentric position (astropy)
        centre = np.array([a.header[k] for k in ("ARRAYX", "ARRAYY", "ARRAYZ")])
        assert 6.35e6 < np.linalg.norm(centre) < 6.39e6

        w = hdul["OI_WAVELENGTH"]                   # Table 5 (from memory)
        assert w.header["OI_REVN"] == 2
        assert w.header["INSNAME"] == obs.insname
        assert w.columns["EFF_WAVE"].unit == "m"
        assert w.columns["EFF_BAND"].unit == "m"

        for ext in ("OI_VIS2", "OI_VIS", "OI_T3"):  # Tables 6, 7 and OI_T3 (memory)
            h = hdul[ext].header
            assert h["OI_REVN"] == 2, ext
            assert h["DATE-OBS"] == "2026-12-01", ext   # a date, no time
            assert h["ARRNAME"] == array.arrname, ext
            assert h["INSNAME"] == obs.insname, ext
            cols = hdul[ext].columns
            for col in ("TARGET_ID", "TIME", "MJD", "INT_TIME", "STA_INDEX", "FLAG"):
                assert col in cols.names, (ext, col)
            assert cols["INT_TIME"].unit == "s"
        v2 = hdul["OI_VIS2"].columns
        assert v2["UCOORD"].unit == "m" and v2["VCOORD"].unit == "m"
        assert v2["VIS2DATA"].format == "7D" and v2["FLAG"].format == "7L"
        assert v2["STA_INDEX"].format == "2I"
        vis = hdul["OI_VIS"]
        assert vis.columns["VISPHI"].unit == "deg" and vis.columns["VISPHIERR"].unit == "deg"
        assert vis.header["AMPTYP"] == "absolute" and vis.header["PHITYP"] == "absolute"
        t3 = hdul["OI_T3"].columns
        assert t3["T3PHI"].unit == "deg" and t3["T3PHIERR"].unit == "deg"
        for col in ("U1COORD", "V1COORD", "U2COORD", "V2COORD"):
            assert t3[col].unit == "m"
        assert t3["STA_INDEX"].format == "3I"
        f = hdul["OI_FLUX"]                          # OI_FLUX (from memory): revision 1
        assert f.header["OI_REVN"] == 1
        assert f.header["CALSTAT"] == "U"
        for col in ("TARGET_ID", "MJD", "INT_TIME", "FLUXDATA", "FLUXERR", "FLAG"):
            assert col in f.columns.names
        np.testing.assert_allclose(hdul["OI_T3"].data["T3PHI"], np.rad2deg(obs.t3phi_rad))
        np.testing.assert_allclose(hdul["OI_VIS2"].data["MJD"], obs.mjd)


def test_merged_file_holds_every_exposure(tmp_path, rng, instrument):
    import oifits
    array = OiArray.from_instrument(instrument)
    obs = [_obs(rng, instrument, mjd=61000.2 + 0.01 * k) for k in range(3)]
    obs.append(_obs(rng, instrument, mjd=61000.3, insname="FOURFOLD_low_joint_P2"))
    path = write_oifits(tmp_path / "merged.fits", obs, array)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        data = oifits.open(str(path), quiet=True)
    assert len(data.vis2) == 6 * 4 and len(data.t3) == 4 * 4
    assert sorted(data.wavelength) == ["FOURFOLD_low_joint", "FOURFOLD_low_joint_P2"]
    with fits.open(path) as hdul:
        assert len(hdul["OI_TARGET"].data) == 1
        assert hdul[0].header["INSMODE"] == "MULTI"
    with pytest.raises(ValueError, match="at least one"):
        write_oifits(tmp_path / "none.fits", [], array)
