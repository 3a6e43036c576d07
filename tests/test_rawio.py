# SPDX-License-Identifier: BSD-3-Clause
"""The raw reader against astropy's own reading of files written per docs/raw_format.md."""

import pickle

import numpy as np
import pytest
from astropy.io import fits
from dask.base import tokenize

from pipeline.errors import BadInput
from pipeline.rawio import RawExposure
from rawfactory import write_raw


@pytest.fixture
def sci_file(tmp_path, rng):
    return write_raw(tmp_path / "sci.fits", "science", rng=rng, nframe=7, n_ft=55)


def test_data_match_astropy(sci_file):
    raw = RawExposure(sci_file)
    pix = raw.science_pixels(frames_per_chunk=3)
    # Chunked by frames, float32 ADU (docs/raw_format.md: uint16 via BZERO=32768).
    assert pix.chunks[0] == (3, 3, 1) and pix.dtype == np.float32
    # Reference: astropy's scaled, non-memmapped read of the same extension.
    np.testing.assert_array_equal(pix.compute(), fits.getdata(sci_file, "SCI_PIX"))
    table = fits.getdata(sci_file, "FT_PIX")
    np.testing.assert_array_equal(raw.ft_counts(), table["COUNTS"])
    np.testing.assert_array_equal(raw.ft_counts(rows_per_chunk=20).compute(), table["COUNTS"])
    np.testing.assert_array_equal(raw.ft_time(), table["TIME"])
    start, exp = raw.frame_times()
    times = fits.getdata(sci_file, "SCI_TIME")
    np.testing.assert_array_equal(start, times["T_START"])
    np.testing.assert_array_equal(exp, times["T_EXP"])
    t, path = raw.metrology()
    met = fits.getdata(sci_file, "METROLOGY")
    np.testing.assert_array_equal(path, met["PATH"])
    np.testing.assert_array_equal(t, met["TIME"])
    assert raw.kind == "science" and raw.setup == "low" and raw.nframe == 7


def test_identity_and_pickling(sci_file, tmp_path, rng):
    raw = RawExposure(sci_file)
    path, size, mtime, sha = raw.identity()
    assert path == str(sci_file.resolve()) and size == sci_file.stat().st_size
    assert len(sha) == 64
    again = pickle.loads(pickle.dumps(raw))
    assert again.identity() == raw.identity() and tokenize(again) == tokenize(raw)
    # A different header (one keyword) gives a different header hash.
    other = write_raw(tmp_path / "other.fits", "science", rng=rng, nframe=7, n_ft=55,
                      header_extra={"SEEING": 0.9})
    assert RawExposure(other).identity()[3] != sha


BAD_HEADERS = [
    ({"SCDIT": None}, "SCDIT"),
    ({"NFRAME": "four"}, "NFRAME should be int"),
    ({"FRAMEKND": "twilight"}, "FRAMEKND='twilight'"),
    ({"SPECSET": "high"}, "SPECSET='high'"),
    ({"SCDIT": -1.0}, "SCDIT=-1.0 must be positive"),
    ({"MJD-OBS": 61001.0}, "disagree"),
    ({"DATE-OBS": "yesterday"}, "DATE-OBS"),
    ({"RA": None}, "missing header keyword RA"),
]


@pytest.mark.parametrize("extra, match", BAD_HEADERS)
def test_bad_headers_name_file_and_keyword(tmp_path, rng, extra, match):
    path = write_raw(tmp_path / "bad.fits", "science", rng=rng, header_extra=extra)
    with pytest.raises(BadInput, match=match) as info:
        RawExposure(path)
    assert info.value.path == str(path.resolve())


def test_kind_specific_keywords(tmp_path, rng):
    p = write_raw(tmp_path / "beam.fits", "lamp-beam", rng=rng, lamptel=0)
    with pytest.raises(BadInput, match="LAMPTEL=0"):
        RawExposure(p)
    p = write_raw(tmp_path / "cal.fits", "calibrator", rng=rng, header_extra={"CALDIAM": None})
    with pytest.raises(BadInput, match="CALDIAM"):
        RawExposure(p)


def test_truncated_and_garbage_files(tmp_path, rng):
    p = write_raw(tmp_path / "trunc.fits", "dark", rng=rng)
    data = p.read_bytes()
    p.write_bytes(data[: len(data) // 2])
    with pytest.raises(BadInput, match="trunc.fits") as info:
        RawExposure(p)
    assert "truncated" in info.value.problem or "readable" in info.value.problem
    g = tmp_path / "garbage.fits"
    g.write_bytes(b"this is not a FITS file" * 10)
    with pytest.raises(BadInput, match="garbage.fits: not a readable FITS file"):
        RawExposure(g)
    with pytest.raises(BadInput, match="cannot read file"):
        RawExposure(tmp_path / "absent.fits")


def test_cube_inconsistent_with_header(tmp_path, rng):
    p = write_raw(tmp_path / "short.fits", "dark", rng=rng, nframe=4,
                  header_extra={"NFRAME": 5, "EXPTIME": 5.0})
    raw = RawExposure(p)            # the header alone is valid
    with pytest.raises(BadInput, match="SCI_PIX has 4 frames, NFRAME says 5"):
        raw.science_pixels()
