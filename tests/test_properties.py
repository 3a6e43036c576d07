# SPDX-License-Identifier: BSD-3-Clause
"""Property-based tests (hypothesis): header parsing, the inventory and the averaging
estimators never fail with anything but a clear error, and keep their invariants."""

import itertools
import shutil
import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.errors import BadInput
from pipeline.inventory import Inventory, Record
from pipeline.numerics.averaging import BASELINES, TRIANGLES, average_exposure
from pipeline.rawio import RawExposure
from rawfactory import write_raw

SETTINGS = settings(max_examples=25, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.function_scoped_fixture])

# Header keywords of docs/raw_format.md that a science exposure carries.
KEYWORDS = ["DATE-OBS", "MJD-OBS", "EXPTIME", "OBJECT", "FRAMEKND", "SPECSET", "POLMODE",
            "SCDIT", "NFRAME", "FTPERIOD", "LAMPTEL", "EXPNO", "RA", "DEC", "FTOBJECT", "FTRA",
            "FTDEC", "STATION1", "STATION4", "AMBTEMP", "SEEING"]
# FITS header values: no NaN or infinity (the standard has none), printable ASCII text.
VALUES = st.one_of(st.none(), st.booleans(), st.integers(-10**9, 10**9),
                   st.floats(allow_nan=False, allow_infinity=False, width=32),
                   st.text(st.characters(min_codepoint=32, max_codepoint=126), max_size=20))


@pytest.fixture(scope="module")
def scratch():
    d = Path(tempfile.mkdtemp(prefix="twinfield-props-"))
    yield d
    shutil.rmtree(d, ignore_errors=True)


_counter = itertools.count()


@SETTINGS
@given(key=st.sampled_from(KEYWORDS), value=VALUES)
def test_any_header_value_is_parsed_or_named(scratch, key, value):
    """One keyword of a valid science file set to anything (None deletes it): the file
    opens with that value, or BadInput names the file and that keyword. Changing the
    frame kind may instead name a keyword or extension that the new kind requires."""
    path = scratch / f"h{next(_counter)}.fits"
    write_raw(path, "science", rng=np.random.default_rng(0), nframe=1, n_ft=2,
              header_extra={key: value})
    try:
        raw = RawExposure(path)
    except BadInput as exc:
        assert exc.path == str(path.resolve()) and str(exc).startswith(exc.path + ": ")
        assert "\n" not in exc.problem
        assert key in exc.problem or key == "FRAMEKND", exc.problem
        return
    rec = Record.from_raw(raw)
    assert value is not None or key in ("AMBTEMP", "SEEING", "EXPTIME")
    if key == "SCDIT":
        assert rec.dit == value > 0
    if key == "SPECSET":
        assert rec.setup == value
    if key == "NFRAME":
        assert rec.nframe == value >= 1


KINDS = ["dark", "flat", "lamp-beam", "lamp-scan", "sky", "calibrator", "science"]
FILES = st.lists(st.tuples(st.sampled_from(KINDS), st.sampled_from([0.02, 0.1, 1.0]),
                           st.sampled_from(["joint", "split"]), st.integers(1, 4),
                           st.floats(0.0, 0.5)), min_size=1, max_size=7)


@settings(max_examples=8, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(files=FILES, duplicate=st.booleans())
def test_inventory_associations(scratch, files, duplicate):
    """Any mix of files: every file is a record or listed as bad; a copied file is listed
    once as a duplicate; each association agrees with a brute-force search of the records."""
    night = scratch / f"n{next(_counter)}"
    night.mkdir()
    rng = np.random.default_rng(1)
    for i, (kind, dit, pol, tel, t) in enumerate(files):
        write_raw(night / f"f{i}.fits", kind, rng=rng, dit=dit, polmode=pol, nframe=1, n_ft=2,
                  lamptel=tel if kind == "lamp-beam" else 0, expno=i + 1, mjd=61000.1 + t)
    if duplicate:
        shutil.copy2(night / "f0.fits", night / "zz_copy.fits")
    inv = Inventory.scan(night)
    assert len(inv.records) + len(inv.bad) == len(files) + duplicate
    assert len(inv.records) == len(files)
    assert [Path(p).name for p, _ in inv.bad] == (["zz_copy.fits"] if duplicate else [])
    assert [r.mjd for r in inv.records] == sorted(r.mjd for r in inv.records)
    missing = {(Path(p).name, m.split(" ")[1]) for p, m in inv.problems()}
    for rec in inv.records:
        darks = [r for r in inv.records if r.kind == "dark" and r.setup == rec.setup
                 and np.isclose(r.dit, rec.dit)]
        key = inv.dark_for(rec)
        assert (key is None) == (not darks)
        if key is not None:
            assert key[0] == rec.setup and np.isclose(key[2], rec.dit)
        if rec.kind != "dark":
            assert ((Path(rec.path).name, "dark") in missing) == (not darks)
        cals = inv.calibrators_for(rec)
        assert all(c.kind == "calibrator" and (c.setup, c.polmode) == (rec.setup, rec.polmode)
                   for c in cals)
        others = [r for r in inv.records if r.kind == "calibrator" and r not in cals
                  and (r.setup, r.polmode) == (rec.setup, rec.polmode)]
        assert all(abs(c.mjd - rec.mjd) <= abs(o.mjd - rec.mjd) for c in cals for o in others)
    assert len(inv.table()) == len(inv.records)
    assert "\n" not in "".join(m for _, m in inv.problems())


@st.composite
def point_source_frames(draw):
    """Coherent fluxes of a point source seen through random per-telescope pistons and
    random fluxes: C_ij = sqrt(F_i F_j) exp(i (p_i - p_j)) (DEVELOPERS.md sign), noise-free."""
    n_frame, n_wave = draw(st.integers(2, 6)), draw(st.integers(1, 3))
    seed = draw(st.integers(0, 2**31 - 1))
    rng = np.random.default_rng(seed)
    flux = rng.uniform(1.0, 1e4, size=(n_frame, 1, 4, n_wave))
    piston = rng.uniform(-50.0, 50.0, size=(n_frame, 1, 4, n_wave))
    contrast = draw(st.floats(0.0, 1.0))
    coherent = np.empty((n_frame, 1, 6, n_wave), complex)
    for b, (i, j) in enumerate(BASELINES):
        coherent[:, :, b] = contrast * np.sqrt(flux[:, :, i] * flux[:, :, j]) * np.exp(
            1j * (piston[:, :, i] - piston[:, :, j]))
    return coherent, flux, contrast


@SETTINGS
@given(data=point_source_frames())
def test_point_source_with_pistons(data):
    """Closure phase arg sum_f C_ij C_jk conj(C_ik): the pistons cancel on every triangle
    (Jennison 1958, MNRAS 118, 276), so each of the 4 is 0 modulo 2 pi; V2 is the
    squared contrast, finite and in [0, 1] (|C_ij|^2 <= F_i F_j frame by frame)."""
    coherent, flux, contrast = data
    res = average_exposure(coherent, np.zeros(coherent.shape), flux, n_boot=4, seed=1)
    assert res.t3phi.shape == (1, len(TRIANGLES), coherent.shape[-1])
    if contrast > 1e-3:      # below, the triple products are ~1e-9 of the fluxes: rounding
        # rounding of products of 1e4-size fluxes: 1e-9 rad is far above double precision
        assert np.all(np.abs(np.angle(np.exp(1j * res.t3phi))) < 1e-9)
    assert np.all(np.isfinite(res.vis2))
    assert np.all(res.vis2 >= -1e-12) and np.all(res.vis2 <= 1.0 + 1e-12)
    # V2 = contrast^2 exactly for this model (no noise, no contrast loss); 1e-9 relative
    # tolerance: rounding only.
    np.testing.assert_allclose(res.vis2, contrast ** 2, rtol=1e-9, atol=1e-12)


@SETTINGS
@given(seed=st.integers(0, 2**31 - 1), n_frame=st.integers(2, 5),
       noise=st.floats(0.0, 100.0))
def test_v2_of_random_coherent_fluxes_is_sane(seed, n_frame, noise):
    """Random coherent fluxes with |C_ij| <= sqrt(F_i F_j) and their stated noise: the
    debiased V2 is finite and at most 1 plus its bias term, never NaN or infinite."""
    rng = np.random.default_rng(seed)
    flux = rng.uniform(10.0, 1e4, size=(n_frame, 1, 4, 2))
    amp = rng.uniform(0.0, 1.0, size=(n_frame, 1, 6, 2))
    phase = rng.uniform(-np.pi, np.pi, size=(n_frame, 1, 6, 2))
    coherent = np.empty((n_frame, 1, 6, 2), complex)
    for b, (i, j) in enumerate(BASELINES):
        coherent[:, :, b] = amp[:, :, b] * np.sqrt(flux[:, :, i] * flux[:, :, j]) * np.exp(
            1j * phase[:, :, b])
    var = np.full(coherent.shape, noise ** 2)
    res = average_exposure(coherent, var, flux, n_boot=4, seed=2)
    assert np.all(np.isfinite(res.vis2)) and np.all(np.isfinite(res.vis2_err))
    # |C|^2 - 2 s2 <= F_i F_j per frame, so V2 <= 1; the debiasing can only lower it,
    # down to -2 s2 / min(F_i F_j) (all-zero coherent flux).
    fij = np.stack([flux[:, :, i] * flux[:, :, j] for i, j in BASELINES], axis=2)
    assert np.all(res.vis2 <= 1.0 + 1e-12)
    assert np.all(res.vis2 >= -2 * noise ** 2 / fij.min(axis=0) - 1e-12)
    assert np.all(np.abs(res.t3phi) <= np.pi + 1e-12)
