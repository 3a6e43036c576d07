# SPDX-License-Identifier: BSD-3-Clause
"""One HDF5 file per product, written atomically, read through :class:`ProductView`.

Layout: ``WORK/<stage>/<label>.<key>.h5``. A product is written under a
temporary name in the same directory, flushed, its ``complete`` attribute set
last, then renamed with ``os.replace``: a file with the final name and
``complete = True`` is trusted, anything else is not. A unit that fails leaves
``WORK/<stage>/<label>.<key>.failed.json`` with the message instead.

Datasets carry ``axes`` (JSON list) and ``unit`` attributes; large ones are
chunked and compressed; complex arrays are stored natively; numpy structured
arrays are tables (unicode fields stored as UTF-8 bytes and restored on read);
dask arrays are written chunk by chunk.
"""

from __future__ import annotations

import json
import os
import threading
import uuid
import zlib
from datetime import datetime, timezone
from pathlib import Path

import h5py
import numpy as np

from .stage import Array

__all__ = ["ProductView", "product_path", "failure_path", "write_product", "write_failure",
           "read_failure", "is_complete", "products_of"]

COMPRESSION = "lzf"
"""Codec of the larger datasets that compress (:func:`worth_compressing`): LZF (shipped
with h5py; other HDF5 tools read it with the LZF filter plugin). Intermediate products are
mostly noisy floats, which gzip shrinks by only 7-35% here, at three times LZF's CPU
cost, and LZF by 0-3%; those are stored as they are."""
_COMPRESS_ABOVE = 1 << 16       # elements; smaller datasets are stored contiguous
_COMPRESS_RATIO = 0.8           # compress a dataset only when a sample shrinks below this
_SAMPLE_BYTES = 1 << 16         # ... the sample's size


def worth_compressing(sample) -> bool:
    """Whether LZF pays for a dataset, judged on a sample of it (its first 64 kB through
    zlib level 1, the same kind of byte-level LZ77 coder): flags, constant or smooth arrays
    shrink 10-100x, noisy floats (most of a reduction's bytes) by a few percent at most,
    not worth the CPU of compressing them. (Noisy floats cost zlib ~4 ms per 256 kB: a
    night's thousand datasets judged on 64 kB save ~3 s.)"""
    a = np.asarray(sample)
    if a.ndim > 1:           # leading rows only: no copy of a whole non-contiguous array
        a = a[:max(1, -(-_SAMPLE_BYTES // max(a[0].nbytes, 1)))]
    b = np.ascontiguousarray(a).reshape(-1).view(np.uint8)[:_SAMPLE_BYTES].tobytes()
    return len(b) > 0 and len(zlib.compress(b, 1)) < _COMPRESS_RATIO * len(b)


_H5_LOCK = threading.RLock()    # short reads; h5py itself serialises library calls


def product_path(workdir, stage: str, label: str, key: str) -> Path:
    return Path(workdir) / stage / f"{label}.{key}.h5"


def failure_path(workdir, stage: str, label: str, key: str) -> Path:
    return Path(workdir) / stage / f"{label}.{key}.failed.json"


def products_of(workdir, stage: str, label: str) -> list[Path]:
    """Every complete-named product file of (stage, label), whatever its key."""
    d = Path(workdir) / stage
    if not d.is_dir():
        return []
    return sorted(p for p in d.glob(f"{label}.*.h5")
                  if p.name.count(".") == label.count(".") + 2)


def is_complete(path) -> bool:
    """True when ``path`` exists, opens as HDF5 and has ``complete = True``."""
    path = Path(path)
    if not path.is_file():
        return False
    try:
        with _H5_LOCK, h5py.File(path, "r", locking=False) as f:
            return bool(f.attrs.get("complete", False))
    except (OSError, KeyError):
        return False


def _is_dask(x) -> bool:
    return type(x).__module__.startswith("dask.array") and hasattr(x, "chunks")


def _encode_table(data: np.ndarray):
    """Structured array -> (h5-storable array, names of unicode fields)."""
    fields, unicode = [], []
    for name in data.dtype.names:
        dt = data.dtype[name]
        if dt.kind == "U":
            unicode.append(name)
            width = max(1, max((len(s.encode()) for s in data[name].ravel()), default=1))
            fields.append((name, f"S{width}"))
        elif dt.kind == "O":
            raise TypeError(f"table field {name!r} has object dtype; use str or numbers")
        else:
            fields.append((name, dt))
    out = np.empty(data.shape, dtype=fields)
    for name in data.dtype.names:
        out[name] = (np.char.encode(data[name], "utf-8") if name in unicode else data[name])
    return out, unicode


def _first_blocks(outputs: dict) -> dict:
    """The first chunk (along the first axis) of every non-empty dask output, computed
    together: outputs made by one task (the FT chain's flux, coherent flux and variance)
    share their first block's work, which :func:`_write_dataset` then writes, so it is
    not computed again with the rest."""
    names, samples = [], []
    for name, item in outputs.items():
        data = item.data if isinstance(item, Array) else item
        if _is_dask(data) and data.size:
            names.append(name)
            samples.append(data[:data.chunks[0][0]] if data.ndim else data)
    if not samples:
        return {}
    import dask
    from dask.local import get_sync
    return dict(zip(names, dask.compute(*samples, scheduler=get_sync)))


def _write_dataset(group, name: str, item, pending: list, first=None):
    """Create dataset ``name``. A dask array's first block along its first axis
    (``first``, from :func:`_first_blocks`; None when it is empty) decides its compression
    and is written at once; the rest is appended to ``pending`` as (array, dataset, region)
    for one :func:`_store_pending` of all of them."""
    arr = item if isinstance(item, Array) else Array(item, axes=tuple(
        f"dim_{i}" for i in range(np.ndim(item))))
    data = arr.data
    if _is_dask(data):
        chunks = tuple(max(c) if c else 1 for c in data.chunks)
        squeeze = first is not None and worth_compressing(first)
        dset = group.create_dataset(name, shape=data.shape, dtype=data.dtype,
                                    chunks=chunks if data.size else None,
                                    compression=COMPRESSION if squeeze else None)
        if first is not None and data.ndim == 0:
            dset[()] = first
        elif first is not None:
            n0 = len(first)
            dset[:n0] = first
            if n0 < data.shape[0]:
                pending.append((data[n0:], dset, (slice(n0, None),)))
    else:
        data = np.asarray(data)
        unicode = []
        if data.dtype.names:
            data, unicode = _encode_table(data)
        elif data.dtype.kind == "U":
            data = np.char.encode(data, "utf-8")
            unicode = ["__all__"]
        big = data.size > _COMPRESS_ABOVE and data.ndim > 0 and worth_compressing(data)
        dset = group.create_dataset(name, data=data, chunks=True if big else None,
                                    compression=COMPRESSION if big else None)
        if unicode:
            dset.attrs["unicode_fields"] = json.dumps(unicode)
    dset.attrs["axes"] = json.dumps(list(arr.axes))
    dset.attrs["unit"] = arr.unit
    if arr.doc:
        dset.attrs["doc"] = arr.doc


def computed_here(a) -> np.ndarray:
    """A dask array computed in the calling thread. The scheduler is passed as a
    function: a scheduler named by a string makes dask import ``distributed`` (about a
    second of CPU per process) to look for a client first."""
    from dask.local import get_sync
    return np.asarray(a.compute(scheduler=get_sync))


def _store_pending(pending):
    """Write the dask datasets of one product in one pass, chunk by chunk, in this thread:
    work they share (e.g. one task feeding several datasets) is computed once, and
    memory stays a few chunks whatever the size."""
    if pending:
        import dask.array as da
        from dask.local import get_sync
        da.store([d for d, _, _ in pending], [t for _, t, _ in pending],
                 regions=[r for _, _, r in pending], lock=threading.Lock(), scheduler=get_sync)


def _attr_value(value):
    if isinstance(value, (str, bool, int, float, np.integer, np.floating, np.bool_)):
        return value
    if value is None:
        return json.dumps(None)
    return json.dumps(value, default=repr)


def write_product(path, outputs: dict, provenance: dict) -> Path:
    """Write a product atomically.

    Parameters
    ----------
    path : final path ``WORK/<stage>/<label>.<key>.h5``
    outputs : mapping name -> Array | ndarray | dask array | scalar | str | JSON-able
        Arrays become datasets, everything else attributes.
    provenance : mapping of JSON-able values, stored as attributes (``prov_`` prefix
        is not added; keys must not collide with outputs).
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.{os.getpid()}-{uuid.uuid4().hex[:8]}.tmp")
    try:
        with h5py.File(tmp, "w") as f:
            for k, v in provenance.items():
                f.attrs[k] = _attr_value(v)
            pending, firsts = [], _first_blocks(outputs)
            for name, item in outputs.items():
                if isinstance(item, Array) or isinstance(item, np.ndarray) or _is_dask(item):
                    _write_dataset(f, name, item, pending, firsts.get(name))
                else:
                    f.attrs[name] = _attr_value(item)
            _store_pending(pending)
            f.flush()
            f.attrs["complete"] = True
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
    return path


def write_failure(workdir, stage, label, key, message: str, provenance: dict) -> Path:
    path = failure_path(workdir, stage, label, key)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.{uuid.uuid4().hex[:8]}.tmp")
    tmp.write_text(json.dumps({"message": message, "created": _utc_now(), **provenance},
                              default=repr, indent=1))
    os.replace(tmp, path)
    return path


def read_failure(workdir, stage, label, key) -> str | None:
    path = failure_path(workdir, stage, label, key)
    try:
        return json.loads(path.read_text())["message"]
    except (OSError, ValueError, KeyError):
        return None


def _utc_now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


class ProductView:
    """Read access to one product file.

    ``view["name"]`` -> numpy array (tables as structured arrays), ``view.dask(name)``
    -> chunked dask array, ``view.attrs`` -> dict, ``view.axes(name)``,
    ``view.unit(name)``, ``name in view``, ``view.path``, ``view.key``.
    """

    def __init__(self, path):
        self.path = Path(path)
        if not is_complete(self.path):
            from .errors import BadInput
            raise BadInput(self.path, "product is missing or incomplete")
        self._file = None
        self._attrs = None

    def _h5(self):
        if self._file is None:
            self._file = h5py.File(self.path, "r", locking=False)   # immutable once renamed
        return self._file

    def close(self):
        if self._file is not None:
            self._file.close()
            self._file = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def __reduce__(self):
        return (ProductView, (str(self.path),))

    def __dask_tokenize__(self):
        return ("ProductView", str(self.path), self.key)

    def __contains__(self, name) -> bool:
        with _H5_LOCK:
            return name in self._h5()

    def keys(self) -> list[str]:
        with _H5_LOCK:
            return list(self._h5().keys())

    @property
    def key(self) -> str:
        return self.attrs.get("key", "")

    @property
    def attrs(self) -> dict:
        """The product's attributes (a new dict each time). Read from the file once: a
        product never changes after it is renamed into place, and stages look up a few
        attributes of the same calibrator many times."""
        if self._attrs is None:
            with _H5_LOCK:
                self._attrs = {k: (v.item() if isinstance(v, np.generic) else v)
                               for k, v in self._h5().attrs.items()}
        return dict(self._attrs)

    def _dset(self, name):
        f = self._h5()
        if name not in f:
            from .errors import BadInput
            raise BadInput(self.path, f"product has no dataset {name!r} "
                                      f"(has {sorted(f.keys())})")
        return f[name]

    def __getitem__(self, name) -> np.ndarray:
        with _H5_LOCK:
            d = self._dset(name)
            data = d[()]
            unicode = json.loads(d.attrs.get("unicode_fields", "[]"))
        if unicode == ["__all__"]:
            return np.char.decode(data, "utf-8")
        if unicode:
            fields = [(n, f"U{max(1, data.dtype[n].itemsize)}" if n in unicode else data.dtype[n])
                      for n in data.dtype.names]
            out = np.empty(data.shape, dtype=fields)
            for n in data.dtype.names:
                out[n] = np.char.decode(data[n], "utf-8") if n in unicode else data[n]
            return out
        return data

    def rows(self, name, start: int, stop: int) -> np.ndarray:
        """Rows ``start:stop`` of a numeric dataset (its first axis), read through the
        open file: a long series read a block at a time (cheaper than a dask array of
        the dataset, which opens the file for every chunk it reads)."""
        with _H5_LOCK:
            return self._dset(name)[start:stop]

    def shape(self, name) -> tuple[int, ...]:
        with _H5_LOCK:
            return tuple(self._dset(name).shape)

    def axes(self, name) -> tuple[str, ...]:
        with _H5_LOCK:
            return tuple(json.loads(self._dset(name).attrs["axes"]))

    def unit(self, name) -> str:
        with _H5_LOCK:
            return str(self._dset(name).attrs["unit"])

    def dask(self, name):
        """Dataset as a dask array chunked like the file (read lazily)."""
        import dask.array as da
        with _H5_LOCK:
            d = self._dset(name)
            chunks = d.chunks or d.shape
            shape, dtype = d.shape, d.dtype
        from dask.base import tokenize
        return da.from_array(_H5Block(str(self.path), name, shape, dtype), chunks=chunks,
                             asarray=False,
                             name=f"product-{name}-" + tokenize(str(self.path), self.key, name))


class _H5Block:
    """Picklable lazy accessor of one dataset (opens the file per read)."""

    def __init__(self, path, name, shape, dtype):
        self.path, self.name, self.shape, self.dtype = path, name, tuple(shape), np.dtype(dtype)
        self.ndim = len(self.shape)

    def __getitem__(self, index):
        with _H5_LOCK, h5py.File(self.path, "r", locking=False) as f:
            return f[self.name][index]
