# SPDX-License-Identifier: BSD-3-Clause
"""The catalogue of bad inputs (docs/bad_inputs.md): each case damages a copy of the
simulated tiny night, reduces it with ``twinfield reduce`` and checks the one-line
message naming the file and the problem, the documented exit code (docs/cli.md), that no
traceback is printed, and that every product the damage does not touch is still current.

The damaged night reuses the clean reduction's products (tests/robust_night.py), so each
case recomputes only what the damage reaches. The ``report`` stage is left out (it only
draws pictures of products checked here and takes seconds).
"""

import re
import shutil
import subprocess
import sys
import warnings

import numpy as np
import pytest
from astropy.io import fits
from astropy.time import Time

import pipeline.engine as engine
import recipes
from pipeline.cli import main
from robust_night import astrometry_rows, clean_work, copy_work, night_path, same_array

pytestmark = pytest.mark.slow

SCI, CAL = "*_science_*.fits", "*_calibrator_*.fits"
# What a damaged science exposure takes down with it: its own branch, and the night-level
# units that aggregate every science exposure (the tiny night has only one).
SCI_BRANCH = {("extract", "sci"), ("reference", "sci"), ("average", "sci"),
              ("calibrate", "sci"), ("binary", "sci"), ("merge", "night"), ("tables", "night")}
CAL_BRANCH = {("extract", "cal"), ("reference", "cal"), ("average", "cal"),
              ("calibrate", "sci"), ("binary", "sci"), ("merge", "night"), ("tables", "night")}


def _one(night, pattern):
    (path,) = night.glob(pattern)
    return path


def _header(pattern, **cards):
    """Set (value) or delete (None) primary-header keywords of one file."""
    def damage(night):
        with fits.open(_one(night, pattern), mode="update") as hdul:
            for key, value in cards.items():
                if value is None:
                    del hdul[0].header[key]
                else:
                    hdul[0].header[key] = value
        return _one(night, pattern)
    return damage


def _rewrite(pattern, edit):
    """Rewrite one file after ``edit(hdul)`` changed its HDUs in memory."""
    def damage(night):
        path = _one(night, pattern)
        with fits.open(path) as hdul:
            new = fits.HDUList([h.copy() for h in hdul])
        edit(new)
        new.writeto(path, overwrite=True)
        return path
    return damage


def _truncate(night):
    path = _one(night, SCI)
    with open(path, "r+b") as fh:
        fh.truncate(path.stat().st_size // 2)
    return path


def _narrow(hdul):            # 20 columns where the low set-up reads 24
    hdul["SCI_PIX"].data = np.ascontiguousarray(hdul["SCI_PIX"].data[:, :, :20])


def _float_cube(hdul):        # float pixels with a NaN where uint16 ADU are expected
    data = hdul["SCI_PIX"].data.astype(np.float32)
    data[0, 5, 5] = np.nan
    hdul["SCI_PIX"] = fits.ImageHDU(data, name="SCI_PIX")


def _nan_metrology(hdul):
    hdul["METROLOGY"].data["PATH"][3, 1] = np.nan


def _fill(value):
    def edit(hdul):
        hdul["SCI_PIX"].data[:] = value
    return edit


def _drop(ext):
    def edit(hdul):
        del hdul[ext]
    return edit


def _future(night):
    with warnings.catch_warnings():       # beyond the leap-second table: "dubious year"
        warnings.simplefilter("ignore")
        t = Time("2031-04-18T12:02:00", scale="utc")
        cards = {"DATE-OBS": t.isot, "MJD-OBS": t.mjd}
    return _header(SCI, **cards)(night)


def _text_file(night):
    path = night / "observing_notes.fits"
    path.write_text("seeing 0.7 arcsec, clouds after 03:00\n")
    return path


def _foreign_fits(night):
    path = night / "guider_image.fits"
    fits.PrimaryHDU(np.zeros((8, 8), np.int16)).writeto(path)
    return path


def _duplicate(night):
    path = night / "copy_of_science.fits"
    shutil.copy2(_one(night, SCI), path)
    return path


def _split_copy(night):
    """An exposure in a set-up (split polarisation) that has no calibration tonight."""
    path = night / "split_science.fits"
    shutil.copy2(_one(night, SCI), path)
    with fits.open(path, mode="update") as hdul:
        hdul[0].header["POLMODE"], hdul[0].header["EXPNO"] = "split", 99
    return path


# name: (damage, exit code, where the message is, message pattern, units lost)
# ``where``: "unreadable" (summary UNREADABLE line + stderr error), "failed" (summary FAILED
# line); exit codes from docs/cli.md.
CASES = {
    "truncated FITS": (_truncate, 1, "unreadable", r"truncated: the headers announce",
                       SCI_BRANCH),
    "wrong image dimensions": (_rewrite(SCI, _narrow), 1, "failed",
                               r"SCI_PIX has 20 columns, set-up 'low' reads 24", SCI_BRANCH),
    "missing keyword": (_header(SCI, SCDIT=None), 1, "unreadable",
                        r"missing header keyword SCDIT", SCI_BRANCH),
    "malformed keyword type": (_header(SCI, NFRAME="four"), 1, "unreadable",
                               r"header keyword NFRAME should be int, found str 'four'",
                               SCI_BRANCH),
    "malformed date": (_header(SCI, **{"DATE-OBS": "yesterday"}), 1, "unreadable",
                       r"DATE-OBS='yesterday' is not an ISO 8601 date", SCI_BRANCH),
    "unknown frame kind": (_header(SCI, FRAMEKND="bias"), 1, "unreadable",
                           r"FRAMEKND='bias' is not one of", SCI_BRANCH),
    "float cube with NaN": (_rewrite(SCI, _float_cube), 1, "failed",
                            r"SCI_PIX should be a 16-bit \(frame, y, x\) cube, found BITPIX=-32",
                            SCI_BRANCH),
    "NaN metrology": (_rewrite(SCI, _nan_metrology), 1, "failed",
                      r"extension METROLOGY column PATH has 1 row\(s\) with NaN", SCI_BRANCH),
    "saturated frames": (_rewrite(SCI, _fill(65535)), 1, "failed",
                         r"science frame 0 is saturated \(65535 ADU\) in every pixel",
                         SCI_BRANCH),
    "all-zero frames": (_rewrite(SCI, _fill(0)), 1, "failed",
                        r"science frame 0 is 0 ADU in every pixel", SCI_BRANCH),
    "no calibration of its set-up": (_header(SCI, SPECSET="medium"), 1, "failed",
                                     r"no calibration product dark/sci-medium-joint-dit0.1",
                                     SCI_BRANCH),
    "duplicated file": (_duplicate, 1, "unreadable",
                        r"duplicate of FF_\S+_science_0011.fits \(identical primary header\)",
                        set()),
    "non-FITS file": (_text_file, 1, "unreadable", r"not a readable FITS file", set()),
    "foreign FITS file": (_foreign_fits, 1, "unreadable", r"missing header keyword FRAMEKND",
                          set()),
    "calibrator without diameter": (_header(CAL, CALDIAM=None), 1, "unreadable",
                                    r"missing header keyword CALDIAM", CAL_BRANCH),
    "negative calibrator diameter": (_header(CAL, CALDIAM=-0.5), 1, "unreadable",
                                     r"CALDIAM/CALDIAME must be non-negative", CAL_BRANCH),
    "metrology table missing": (_rewrite(SCI, _drop("METROLOGY")), 1, "unreadable",
                                r"missing extension METROLOGY", SCI_BRANCH),
    "fringe-tracker table missing": (_rewrite(SCI, _drop("FT_PIX")), 1, "unreadable",
                                     r"missing extension FT_PIX", SCI_BRANCH),
    "negative DIT": (_header(SCI, SCDIT=-0.1), 1, "unreadable",
                     r"header keyword SCDIT=-0.1 must be positive", SCI_BRANCH),
    "date in the future": (_future, 1, "unreadable", r"DATE-OBS='2031-04-18T12:02:00.000' is "
                                                     r"in the future", SCI_BRANCH),
    "DATE-OBS and MJD-OBS disagree": (_header(SCI, **{"MJD-OBS": 61000.0}), 1, "unreadable",
                                      r"disagree by more than 1 s", SCI_BRANCH),
}
# An extra exposure in a set-up without calibrations: its own branch fails; ``tables``
# (a partial stage) is remade with the good exposure's row only.
MIXED = (_split_copy, 1, "failed", r"no calibration product flat/sci-low-split",
         {("extract", "split_science"), ("merge", "night"), ("tables", "night")})


@pytest.fixture(scope="module")
def clean(tmp_path_factory, tiny_night):
    return clean_work(tmp_path_factory, tiny_night)


@pytest.fixture
def no_report(monkeypatch):
    monkeypatch.setattr(engine, "_stages",
                        lambda: [s for s in recipes.STAGES if s.name not in recipes.DRAWING])


def _short(stage, label):
    """Clean unit labels -> the names used in the case table."""
    for tag in ("science", "calibrator"):
        if f"_{tag}_" in label:
            return (stage, tag[:3])
    return (stage, label)


def _states(work):
    """(stage, short label) -> (state, key) of every planned product."""
    return {_short(r["stage"], r["name"]): (r["state"], r["key"]) for r in engine.status(work)}


def _check_case(case, tmp_path_factory, tiny_night, clean, tmp_path, capsys):
    damage, code, where, pattern, lost = case
    night = night_path(tmp_path_factory, tiny_night)
    work = copy_work(clean, tmp_path / "work")
    before = {k: v for k, v in _states(work).items() if k[0] not in recipes.DRAWING}
    assert {state for state, _ in before.values()} == {"current"}
    bad_file = damage(night)
    capsys.readouterr()

    assert main(["reduce", str(night), "-o", str(work)]) == code   # docs/cli.md exit codes
    out, err = capsys.readouterr()
    # One line naming the file and the problem; no traceback without --debug.
    assert "Traceback" not in out + err
    assert all(line.startswith("twinfield: ") for line in err.splitlines()), err
    label = "UNREADABLE" if where == "unreadable" else "FAILED [a-z]+/\\S+"
    line = re.search(rf"^  {label}:? (\S+?): (.*)$", out, re.M)
    assert line and str(bad_file) in line.group(0) and re.search(pattern, line.group(2)), out
    if where == "unreadable":
        assert f"twinfield: ERROR: unreadable raw file {bad_file}: " in err
    # Nothing else is lost: every product the damage does not reach is still current.
    after = _states(work)
    kept = {uid for uid in before if uid not in lost}
    assert {uid: after.get(uid, ("absent",))[0] for uid in kept} == dict.fromkeys(kept,
                                                                              "current")
    # ... reused, not recomputed (the inventory, a table of every file, is remade).
    assert {uid: after[uid] for uid in kept if uid[0] != "inventory"} == {
        uid: before[uid] for uid in kept if uid[0] != "inventory"}
    # ... and no clean product of the damaged branch is trusted for the damaged night (a
    # night-level unit left without science exposures is a recorded skip, a new key).
    assert not any(after.get(uid) == before[uid] for uid in lost if uid in before)
    return work


@pytest.mark.parametrize("name", list(CASES))
def test_bad_input(name, tmp_path_factory, tiny_night, clean, tmp_path, capsys, no_report):
    _check_case(CASES[name], tmp_path_factory, tiny_night, clean, tmp_path, capsys)


def test_mixed_setups_keep_the_good_exposures_table(tmp_path_factory, tiny_night, clean,
                                                    tmp_path, capsys, no_report):
    work = _check_case(MIXED, tmp_path_factory, tiny_night, clean, tmp_path, capsys)
    assert same_array(astrometry_rows(work), astrometry_rows(clean))


def test_mixed_setups_keep_the_merged_oifits(tmp_path_factory, tiny_night, clean, tmp_path,
                                             capsys, no_report):
    """The merged per-target OIFITS file is a partial night-level product: remade (its
    inputs changed) without the failed exposure, with the same data as the clean run's."""
    from astropy.io import fits
    work = _check_case(MIXED, tmp_path_factory, tiny_night, clean, tmp_path, capsys)
    assert _states(work)[("merge", "night")][0] == "current"
    merged = sorted((work / "oifits").glob("Kessa-B1_*.fits"))
    assert [m.name for m in merged] == [m.name for m in sorted(
        (clean / "oifits").glob("Kessa-B1_*.fits"))]
    with fits.open(merged[0]) as ours, fits.open(clean / "oifits" / merged[0].name) as ref:
        for ext in ("OI_VIS2", "OI_T3", "OI_WAVELENGTH"):
            for col in ref[ext].columns.names:
                np.testing.assert_array_equal(ours[ext].data[col], ref[ext].data[col])


def test_empty_folder_is_a_usage_error(tmp_path):
    """Through the real command: exit 2, one line, a traceback only with --debug."""
    night = tmp_path / "empty"
    night.mkdir()
    (night / "README.txt").write_text("not a raw file\n")
    cmd = [sys.executable, "-m", "pipeline.cli", "reduce", str(night), "-o",
           str(tmp_path / "work")]
    res = subprocess.run(cmd, capture_output=True, text=True)
    assert res.returncode == 2
    assert res.stderr == (f"twinfield: error: {night}: no raw files (*.fits) in the night "
                          "directory\n")
    res = subprocess.run(cmd[:3] + ["--debug"] + cmd[3:], capture_output=True, text=True)
    assert res.returncode == 2 and "Traceback" in res.stderr


def test_missing_night_directory(tmp_path, capsys):
    assert main(["reduce", str(tmp_path / "nowhere"), "-o", str(tmp_path / "w")]) == 2
    err = capsys.readouterr().err
    assert err == f"twinfield: error: {tmp_path / 'nowhere'}: night directory not found\n"
