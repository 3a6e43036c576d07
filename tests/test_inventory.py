# SPDX-License-Identifier: BSD-3-Clause
"""Inventory: classification, association and the missing-calibration report."""

import numpy as np
import pytest

from pipeline.errors import BadInput
from pipeline.inventory import Inventory, dark_label, ft_dark_label
from rawfactory import small_night, write_raw


@pytest.fixture
def night(tmp_path, rng):
    return small_night(tmp_path / "night", rng, dits=(1.0, 2.0))


def test_classification_and_groups(night):
    inv = Inventory.scan(night)
    assert len(inv.records) == 11 and inv.bad == []
    kinds = sorted(r.kind for r in inv.records)
    assert kinds.count("dark") == 2 and kinds.count("lamp-beam") == 4
    assert kinds.count("science") == 2
    assert inv.channels() == [("low", "joint")]
    assert list(inv.dark_groups()) == [("low", "joint", 1.0), ("low", "joint", 2.0)]
    assert list(inv.ft_dark_groups()) == [0.001]
    # Records are in time order (MJD-OBS written by the factory).
    mjd = [r.mjd for r in inv.records]
    assert mjd == sorted(mjd)
    table = inv.table()
    assert table.shape == (11,) and set(table["kind"]) >= {"dark", "science"}


def test_association(night, rng):
    write_raw(night / "cal_late.fits", "calibrator", rng=rng, mjd=61000.30, expno=40)
    inv = Inventory.scan(night)
    sci = inv.record(night / "sci0.fits")
    cal = inv.calibrations_for(sci)
    assert dark_label(*cal["dark"]) == "sci-low-joint-dit1"
    assert ft_dark_label(cal["ft_dark"]) == "ft-period1ms"
    assert len(cal["flat"]) == 1 and {r.lamptel for r in cal["lamp-beam"]} == {1, 2, 3, 4}
    # Nearest in time first: cal.fits (MJD 61000.10) before cal_late.fits (61000.30).
    assert [r.name for r in cal["calibrator"]] == ["cal", "cal_late"]
    assert inv.problems() == []


def test_missing_calibrations_are_reported(night, rng):
    (night / "flat.fits").unlink()
    write_raw(night / "sci_long.fits", "science", rng=rng, dit=3.0, mjd=61000.2, expno=50)
    inv = Inventory.scan(night)
    problems = inv.problems()
    msgs = [m for _, m in problems]
    assert any("no dark of DIT 3 s" in m for m in msgs)
    assert sum("no flat" in m for m in msgs) == 4       # 1 calibrator + 3 science
    report = inv.report()
    assert "MISSING sci_long.fits: no dark of DIT 3 s" in report
    assert "dark MISSING" in report


def test_unreadable_files_are_listed_not_fatal(night):
    (night / "broken.fits").write_bytes(b"SIMPLE  = nonsense")
    inv = Inventory.scan(night)
    assert len(inv.records) == 11
    assert [p.endswith("broken.fits") for p, _ in inv.bad] == [True]
    assert "UNREADABLE" in inv.report()


def test_missing_night_dir(tmp_path):
    with pytest.raises(BadInput, match="night directory not found"):
        Inventory.scan(tmp_path / "nowhere")


def test_dark_of_other_polmode_is_used(tmp_path, rng):
    """The detector window depends on the set-up only: a joint dark serves split frames."""
    write_raw(tmp_path / "d.fits", "dark", rng=rng, polmode="joint")
    write_raw(tmp_path / "s.fits", "science", rng=rng, polmode="split", mjd=61000.2)
    inv = Inventory.scan(tmp_path)
    assert inv.dark_for(inv.record(tmp_path / "s.fits")) == ("low", "joint", 1.0)
    assert np.isnan(inv.record(tmp_path / "d.fits").caldiam)
