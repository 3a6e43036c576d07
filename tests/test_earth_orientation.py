# SPDX-License-Identifier: BSD-3-Clause
"""The kept Earth-orientation table is astropy's own: every column, the metadata and the
sidereal times equal those of astropy parsing its bundled files. astropy's IERS state
belongs to the process, so each case runs in a fresh interpreter."""

import json
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).parents[1]

_PROBE = """
import json, numpy as np
import pipeline
from astropy.time import Time
from pipeline.earth_orientation import use_cached_table
from pipeline.geometry import hour_angle_rad
entry = use_cached_table()
# times across the bundled table: observed values, IERS-B years, predictions
t = Time(np.array([51544.5, 58849.25, 61148.4, 61200.9]), format="mjd", scale="utc")
ha = hour_angle_rad(t, ra_deg=83.6, longitude_deg=-70.4)
print(json.dumps({"entry": entry and str(entry), "ha": ha.tolist()}))
"""

_ENTRY_ONLY = ("import json, pipeline\n"
               "from pipeline.earth_orientation import use_cached_table\n"
               "print(json.dumps({'entry': use_cached_table()}))")


def _run(code, cache, cwd=ROOT):
    env = {"PATH": "/usr/bin:/bin", "HOME": str(cache.parent), "TWINFIELD_CACHE_DIR": str(cache)}
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         env=env, cwd=cwd)
    assert out.returncode == 0, out.stderr
    return json.loads(out.stdout.strip().splitlines()[-1])


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """Hour angles with astropy reading its own files (the cache taken out)."""
    code = ("import pipeline.earth_orientation as eo\n"
            "eo.use_cached_table = lambda: None\n"
            "import pipeline.geometry as g\n"
            "g.use_cached_table = eo.use_cached_table\n" + _PROBE)
    return _run(code, tmp_path_factory.mktemp("reference") / "unused")["ha"]


def test_kept_table_gives_astropy_sidereal_times_bit_for_bit(tmp_path, reference):
    cache = tmp_path / "cache"
    first = _run(_PROBE, cache)                 # parses astropy's files, keeps the table
    assert first["entry"] and Path(first["entry"]).parent == cache
    second = _run(_PROBE, cache)                # reads the kept table
    assert second["entry"] == first["entry"]
    assert first["ha"] == reference
    assert second["ha"] == reference            # exact: the same UT1 - UTC, same formulas


def test_kept_table_has_every_column_and_the_metadata(tmp_path):
    cache = tmp_path / "cache"
    _run(_PROBE, cache)
    code = """
import json, numpy as np, pipeline
from astropy.utils import iers
from pipeline.earth_orientation import use_cached_table
assert use_cached_table() is not None           # the kept table, as the reduction reads it
kept = iers.IERS_Auto.open()
iers.IERS_Auto.iers_table = None
own = iers.IERS_Auto.open()                     # astropy's default, from its bundled files
bad = []
for name in own.colnames:
    a, b = own[name], kept[name]
    same = (a.dtype == b.dtype and getattr(a, "unit", None) == getattr(b, "unit", None)
            and np.array_equal(np.ma.getmaskarray(a), np.ma.getmaskarray(b))
            and np.array_equal(np.asarray(getattr(a, "value", a)),
                               np.asarray(getattr(b, "value", b)),
                               equal_nan=a.dtype.kind == "f"))   # NaN: no value that day
    if not same:
        bad.append(name)
meta = {k: str(v) for k, v in own.meta.items()} == {k: str(v) for k, v in kept.meta.items()}
print(json.dumps({"bad": bad, "meta": meta, "n": [len(own), len(kept)],
                  "cols": [own.colnames, kept.colnames]}))
"""
    out = _run(code, cache)
    assert out["cols"][0] == out["cols"][1]
    assert out["n"][0] == out["n"][1] > 10_000
    assert out["bad"] == []
    assert out["meta"]


def test_a_corrupt_entry_is_replaced_and_the_work_goes_on(tmp_path, reference):
    cache = tmp_path / "cache"
    entry = Path(_run(_PROBE, cache)["entry"])
    entry.write_bytes(b"not an HDF5 file")
    again = _run(_PROBE, cache)
    assert again["ha"] == reference
    assert entry.stat().st_size > 1_000_000     # written again from astropy's files


def test_an_unwritable_cache_leaves_astropy_alone(tmp_path, reference):
    blocker = tmp_path / "file"
    blocker.write_text("a file where the cache directory would be")
    out = _run(_PROBE, blocker / "cache")
    assert out["entry"] is None
    assert out["ha"] == reference


@pytest.mark.parametrize("setting", ["auto_download", "local_file"])
def test_nothing_kept_where_astropy_would_read_other_files(tmp_path, setting):
    cache = tmp_path / "cache"
    cwd = tmp_path / "run"
    cwd.mkdir()
    code = _ENTRY_ONLY
    if setting == "auto_download":
        # only the decision is checked: no table is read (no network here)
        code = ("import pipeline\nfrom astropy.utils import iers\n"
                "iers.conf.auto_download = True\n" + code)    # after pipeline turns it off
    else:
        (cwd / "finals2000A.all").write_text("")   # astropy would read this one instead
    out = _run(code, cache, cwd=cwd)
    assert out["entry"] is None
    assert not cache.exists()
