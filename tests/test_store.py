# SPDX-License-Identifier: BSD-3-Clause
"""Product store: atomic writes, completeness, datasets read back by h5py directly."""

import json
import pickle

import dask.array as da
import h5py
import numpy as np
import pytest

from pipeline.errors import BadInput
from pipeline.stage import Array
from pipeline.store import (ProductView, is_complete, product_path, products_of, read_failure,
                            write_failure, write_product)


def test_round_trip(tmp_path, rng):
    path = product_path(tmp_path, "dark", "sci-low-joint-dit1", "abc123")
    table = np.array([("a.fits", "dark", 1.0), ("bé.fits", "science", 2.5)],
                     dtype=[("path", "U12"), ("kind", "U8"), ("dit", "f8")])
    big = rng.normal(size=(300, 300))
    cplx = rng.normal(size=(4, 6)) + 1j * rng.normal(size=(4, 6))
    lazy = da.from_array(rng.normal(size=(50, 8, 9)), chunks=(7, 8, 9))
    write_product(path, {"master": Array(big, ("y", "x"), "adu", "a doc"),
                         "coherent": Array(cplx, ("baseline", "wave")),
                         "files": Array(table, ("row",)), "frames": Array(lazy, ("f", "y", "x"), "adu"),
                         "plain": np.arange(5), "n_frame": 12, "note": "ok",
                         "fit": {"a": 1.5}},
                  {"stage": "dark", "key": "abc123"})
    assert path.name == "sci-low-joint-dit1.abc123.h5" and is_complete(path)
    # Independent reader: h5py itself.
    with h5py.File(path, "r") as f:
        assert f.attrs["complete"] and f.attrs["n_frame"] == 12
        assert json.loads(f["master"].attrs["axes"]) == ["y", "x"]
        assert f["master"].attrs["unit"] == "adu"
        assert f["master"].compression is None          # large but noise: not compressed
        assert f["frames"].chunks == (7, 8, 9)          # dask chunks kept (written per chunk)
        np.testing.assert_array_equal(f["coherent"][()], cplx)
    view = ProductView(path)
    np.testing.assert_array_equal(view["master"], big)
    np.testing.assert_array_equal(view["frames"], lazy.compute())
    np.testing.assert_array_equal(view.dask("frames").compute(), lazy.compute())
    assert view["files"]["path"][1] == "bé.fits" and view["files"]["dit"][1] == 2.5
    assert view.axes("coherent") == ("baseline", "wave") and view.unit("frames") == "adu"
    assert "master" in view and "absent" not in view
    assert view.attrs["note"] == "ok" and json.loads(view.attrs["fit"]) == {"a": 1.5}
    assert view.key == "abc123"
    again = pickle.loads(pickle.dumps(view))
    np.testing.assert_array_equal(again["plain"], np.arange(5))
    with pytest.raises(BadInput, match="no dataset 'absent'"):
        view["absent"]
    view.close()


def test_incomplete_files_are_not_trusted(tmp_path):
    path = product_path(tmp_path, "dark", "x", "k1")
    path.parent.mkdir(parents=True)
    with h5py.File(path, "w") as f:             # what a crash before the last attribute leaves
        f["master"] = np.zeros(3)
    assert not is_complete(path)
    with pytest.raises(BadInput, match="missing or incomplete"):
        ProductView(path)
    path.write_bytes(b"\x89HDF\r\n garbage")      # a torn file
    assert not is_complete(path)
    assert not is_complete(tmp_path / "nothing.h5")


def test_failed_write_leaves_nothing(tmp_path):
    path = product_path(tmp_path, "dark", "x", "k2")
    bad = np.array([(1, object())], dtype=[("a", "i8"), ("b", "O")])
    with pytest.raises(TypeError, match="object dtype"):
        write_product(path, {"t": Array(bad, ("row",))}, {})
    assert list(path.parent.iterdir()) == []


def test_failure_records_and_listing(tmp_path):
    write_failure(tmp_path, "dark", "lbl", "k3", "raw.fits: truncated", {"stage": "dark"})
    assert read_failure(tmp_path, "dark", "lbl", "k3") == "raw.fits: truncated"
    assert read_failure(tmp_path, "dark", "lbl", "other") is None
    write_product(product_path(tmp_path, "dark", "lbl", "k4"), {"a": np.ones(2)}, {})
    write_product(product_path(tmp_path, "dark", "lbl.v2", "k5"), {"a": np.ones(2)}, {})
    assert [p.name for p in products_of(tmp_path, "dark", "lbl")] == ["lbl.k4.h5"]


def test_only_compressible_datasets_are_compressed(tmp_path, rng):
    # noisy floats (incompressible) are stored as they are; flags and constant arrays,
    # numpy or dask, are LZF-compressed; every value reads back exactly
    noisy = rng.normal(size=(300, 400))
    flags = (rng.random((300, 400)) < 0.01).astype(np.uint8)
    const = da.full((80000, 6), 2.5, chunks=(4096, 6), dtype=np.float32)
    noisy_lazy = da.from_array(rng.normal(size=(80000, 6)).astype(np.float32), chunks=(4096, 6))
    path = write_product(tmp_path / "p.h5", {"noisy": noisy, "flags": flags, "const": const,
                                             "noisy_lazy": noisy_lazy}, {"stage": "t"})
    with h5py.File(path) as f:
        assert f["noisy"].compression is None and f["noisy_lazy"].compression is None
        assert f["flags"].compression == "lzf" and f["const"].compression == "lzf"
        assert f["const"].id.get_storage_size() < 0.05 * const.nbytes
    view = ProductView(path)
    np.testing.assert_array_equal(view["noisy"], noisy)
    np.testing.assert_array_equal(view["flags"], flags)
    np.testing.assert_array_equal(view["const"], np.asarray(const))
    np.testing.assert_array_equal(view["noisy_lazy"], np.asarray(noisy_lazy))
