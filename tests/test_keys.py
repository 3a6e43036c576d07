# SPDX-License-Identifier: BSD-3-Clause
"""Content keys, in the style of dask's check_tokenize: deterministic, stable through
pickling, and different when any input changes."""

import os
import pickle
from dataclasses import replace

import pytest
from dask.base import tokenize

from pipeline.keys import unit_key
from pipeline.rawio import RawExposure
from pipeline.stage import Unit
from pipeline.store import ProductView, write_product
from rawfactory import write_raw
from recipes.dark import DarkParams

RAW = [("/night/a.fits", 1000, 123456789, "ab" * 32)]


def _key(params=DarkParams(), unit=Unit("sci-low-joint-dit1", meta={"dit": 1.0}), raw=RAW,
         up=None, version="1", stage="dark"):
    return unit_key(stage, version, params, unit.label, unit.meta, raw,
                    up or {"dark": "k0", "@instrument": "i0"})


def test_same_twice_and_after_pickle():
    assert _key() == _key()
    p = pickle.loads(pickle.dumps(DarkParams()))
    u = pickle.loads(pickle.dumps(Unit("sci-low-joint-dit1", meta={"dit": 1.0})))
    assert _key(params=p, unit=u) == _key()
    assert len(_key()) == 32


@pytest.mark.parametrize("change", [
    dict(params=DarkParams(kappa=4.0)),
    dict(unit=Unit("sci-low-joint-dit1", meta={"dit": 2.0})),
    dict(unit=Unit("sci-low-joint-dit2", meta={"dit": 1.0})),
    dict(raw=[("/night/a.fits", 1000, 123456790, "ab" * 32)]),       # touched (mtime)
    dict(raw=[("/night/a.fits", 1000, 123456789, "cd" * 32)]),       # header edited
    dict(up={"dark": "k1", "@instrument": "i0"}),
    dict(up={"dark": "k0", "@instrument": "i1"}),                    # instrument model edited
    dict(version="2"),
    dict(stage="flat"),
])
def test_different_when_one_input_changes(change):
    assert _key(**change) != _key()


def test_raw_and_product_tokens_do_not_read_pixels(tmp_path, rng):
    path = write_raw(tmp_path / "d.fits", "dark", rng=rng)
    raw = RawExposure(path)
    assert tokenize(raw) == tokenize(RawExposure(path))
    assert tokenize(pickle.loads(pickle.dumps(raw))) == tokenize(raw)
    st = os.stat(path)
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))
    assert tokenize(RawExposure(path)) != tokenize(raw)
    prod = write_product(tmp_path / "p.key1.h5", {"a": rng.normal(size=3)}, {"key": "key1"})
    view = ProductView(prod)
    assert tokenize(view) == tokenize(ProductView(prod))
    assert tokenize(pickle.loads(pickle.dumps(view))) == tokenize(view)
    view.close()


def test_params_with_same_values_are_equal():
    assert _key(params=replace(DarkParams(), kappa=5.0)) == _key()
