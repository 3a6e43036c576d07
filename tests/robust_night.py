# SPDX-License-Identifier: BSD-3-Clause
"""One simulated tiny night and one clean reduction of it, shared by the robustness tests
(bad inputs, crash safety, concurrent runs, determinism).

Product keys contain each raw file's path, size and modification time, so the night is
copied once to a fixed place (``shutil.copy2`` keeps the modification time to the
nanosecond) and every test that damages it first restores it from the pristine copy:
a damaged night then reuses every clean product its damage does not touch.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import h5py
import numpy as np

_CACHE = {}


def _root(tmp_path_factory) -> Path:
    return tmp_path_factory.getbasetemp() / "robust"


def night_path(tmp_path_factory, tiny_night) -> Path:
    """The working copy of the tiny night, restored to its pristine state."""
    root = _root(tmp_path_factory)
    pristine, night = root / "pristine", root / "night"
    if not pristine.is_dir():
        shutil.copytree(tiny_night, pristine)
    shutil.rmtree(night, ignore_errors=True)
    shutil.copytree(pristine, night)
    return night


def clean_work(tmp_path_factory, tiny_night) -> Path:
    """A complete threads-scheduler reduction of the pristine night (made once)."""
    root = _root(tmp_path_factory)
    key = str(root)
    if key not in _CACHE:
        from pipeline.engine import reduce
        night = night_path(tmp_path_factory, tiny_night)
        summary = reduce(night, root / "clean", progress=False)
        assert summary.exit_code == 0 and not summary.failed, summary.text()
        _CACHE[key] = root / "clean"
    return _CACHE[key]


def copy_work(src: Path, dst: Path) -> Path:
    shutil.copytree(src, dst)
    return dst


def product_files(work: Path) -> dict:
    """(stage, file name) -> path of every product file (``WORK/<stage>/<label>.<key>.h5``)."""
    return {(p.parent.name, p.name): p for p in Path(work).glob("*/*.h5")
            if not p.name.startswith(".")}


def read_datasets(path: Path) -> dict:
    """Every dataset of one product, as numpy arrays."""
    out = {}
    with h5py.File(path, "r", locking=False) as f:
        f.visititems(lambda name, obj: out.__setitem__(name, obj[()])
                     if isinstance(obj, h5py.Dataset) else None)
    return out


def same_array(a, b) -> bool:
    """Bit-for-bit equality, NaN equal to NaN in the same place."""
    a, b = np.asarray(a), np.asarray(b)
    if a.dtype != b.dtype or a.shape != b.shape:
        return False
    if a.dtype.names:
        return all(same_array(a[n], b[n]) for n in a.dtype.names)
    if a.dtype.kind in "fc":
        return bool(np.array_equal(a, b, equal_nan=True))
    return bool(np.array_equal(a, b))


def differing_products(work_a: Path, work_b: Path, *, skip=()) -> list:
    """Products whose sets of files or datasets differ between two work directories
    (stages in ``skip`` left out; the report's HTML is not compared: it holds the
    creation time)."""
    fa, fb = ({k: v for k, v in product_files(w).items() if k[0] not in skip}
              for w in (work_a, work_b))
    diff = sorted(set(fa) ^ set(fb))
    for name in sorted(set(fa) & set(fb)):
        da, db = read_datasets(fa[name]), read_datasets(fb[name])
        if set(da) != set(db) or not all(same_array(da[k], db[k]) for k in da):
            diff.append(name)
    return diff


def astrometry_rows(work: Path) -> np.ndarray:
    """The astrometry table dataset of the newest ``tables`` product."""
    path = max(Path(work).glob("tables/night.*.h5"), key=lambda p: p.stat().st_mtime_ns)
    return read_datasets(path)["astrometry"]
