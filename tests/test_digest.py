# SPDX-License-Identifier: BSD-3-Clause
"""Content digests and the content-addressed array store (pipeline.digest)."""

import numpy as np
import pytest

from pipeline.digest import ArrayCache, content_digest, source_digest


def test_digest_is_typed_and_order_free_for_dicts():
    values = [1, 1.0, "1", True, None, b"1", [1], np.array([1]), np.array([1.0]),
              np.array([1], dtype=np.int32), np.array([[1]]), {"a": 1}, {"1": 1}]
    digests = [content_digest(v) for v in values]
    assert len(set(digests)) == len(values)
    assert content_digest({"a": 1, "b": 2.5}) == content_digest({"b": 2.5, "a": 1})
    # Floats enter by their exact (round-trip) form: the next double is another digest.
    assert content_digest(0.1) != content_digest(np.nextafter(0.1, 1.0))
    assert content_digest(np.arange(6.0)[::2]) == content_digest(np.array([0.0, 2.0, 4.0]))
    with pytest.raises(TypeError, match="set"):
        content_digest({1, 2})


def test_source_digest_follows_the_code(tmp_path):
    import types
    path = tmp_path / "mod.py"
    path.write_text("x = 1\n")
    module = types.SimpleNamespace(__file__=str(path))
    before = source_digest(module)
    path.write_text("x = 2\n")
    assert source_digest(module) != before


def test_array_cache_round_trip_and_bad_entries(tmp_path):
    cache = ArrayCache(tmp_path / "c")
    assert cache.get("k") is None
    arrays = {"a": np.array([1.5, np.nan, -np.inf]), "s": np.array("text"),
              "names": np.array(["dra", "ddec"]), "n": np.asarray(7), "m": np.zeros((0, 0))}
    cache.put("k", arrays)
    got = cache.get("k")
    assert got.keys() == arrays.keys()
    for k, v in arrays.items():
        assert got[k].dtype == v.dtype and np.array_equal(got[k], v, equal_nan=k == "a")
    assert not list(cache.dir.glob(".*.tmp"))
    cache.path("k").write_bytes(cache.path("k").read_bytes()[:40])   # truncated entry
    assert cache.get("k") is None and not cache.path("k").exists()


def test_array_cache_that_cannot_write_only_warns(tmp_path, caplog):
    blocker = tmp_path / "file"
    blocker.write_text("not a directory")
    cache = ArrayCache(blocker / "c")              # its directory cannot be made
    with caplog.at_level("WARNING", logger="twinfield"):
        assert cache.put("k", {"a": np.zeros(3)}) is False
    assert "could not keep k" in caplog.text and cache.get("k") is None
