# SPDX-License-Identifier: BSD-3-Clause
"""Stages declared ``partial`` (night summaries such as the astrometry tables) run with the
upstream products that exist, list the failed ones, and go stale once a missing one appears."""

from fake_stages import CONSUMER, SUMMARY
from pipeline.engine import reduce, status
from pipeline.store import ProductView
from rawfactory import small_night, write_raw
from recipes import dark, inventory

STAGES = [inventory.STAGE, dark.STAGE, CONSUMER, SUMMARY]


def _summary(work):
    row = next(r for r in status(work, stages=STAGES) if r["stage"] == "summary")
    return row, ProductView(row["path"]) if row["path"] else None


def test_summary_runs_without_the_failed_branch_and_goes_stale_when_fixed(tmp_path, rng):
    night = small_night(tmp_path / "night", rng, dits=(1.0, 2.0))
    # A dark whose cube disagrees with its header: its branch fails at run time.
    write_raw(night / "dark_3.fits", "dark", rng=rng, dit=3.0, nframe=4,
              header_extra={"NFRAME": 6, "EXPTIME": 18.0}, mjd=61000.015)
    work = tmp_path / "work"
    run = reduce(night, work, stages=STAGES, progress=False)
    failed = {(s, l) for s, l, _ in run.failed}
    assert failed == {("dark", "sci-low-joint-dit3"), ("consumer", "sci-low-joint-dit3")}
    assert ("summary", "night") in run.computed and run.exit_code == 1
    row, view = _summary(work)
    assert row["state"] == "current"
    assert view["levels"].shape == (2,)                  # the two good branches
    assert "consumer/sci-low-joint-dit3" in view.attrs["failed"]
    assert "dark_3.fits" in view.attrs["failed"]         # the root cause's file is named
    view.close()
    # Mend the bad file: the summary made without it is no longer current.
    write_raw(night / "dark_3.fits", "dark", rng=rng, dit=3.0, nframe=4, mjd=61000.015)
    again = reduce(night, work, stages=STAGES, progress=False)
    assert again.failed == [] and ("summary", "night") in again.computed
    row, view = _summary(work)
    assert view["levels"].shape == (3,) and view.attrs["failed"] == ""
    view.close()
