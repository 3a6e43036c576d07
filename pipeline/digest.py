# SPDX-License-Identifier: BSD-3-Clause
"""Content digests of plain values (arrays, numbers, strings, lists, dicts) and a small
content-addressed store of arrays.

Both serve work that is kept across runs by what it was computed from, not by when:
the report's figures (``pipeline.report``) and the costly part of the binary fit
(``pipeline.binary_product``). A digest is typed, so distinct inputs never feed the
hash the same bytes (``[1, 2]`` and ``"[1, 2]"``, ``1`` and ``1.0`` differ).
"""

from __future__ import annotations

import hashlib
import logging
import os
import threading
import zipfile
from pathlib import Path

import numpy as np

__all__ = ["feed", "content_digest", "source_digest", "ArrayCache"]


def feed(h, value) -> None:
    """Feed ``value`` into the hash object ``h``, typed so distinct inputs never collide."""
    if isinstance(value, np.ndarray):
        if value.dtype.hasobject:           # (e.g. strings): no stable bytes, by element
            h.update(f"O{value.shape}|".encode())
            feed(h, value.ravel().tolist())
            return
        a = np.ascontiguousarray(value)
        h.update(f"A{a.dtype.str}{a.shape}|".encode())
        h.update(a.tobytes())
    elif isinstance(value, (list, tuple)):
        h.update(f"L{len(value)}|".encode())
        for v in value:
            feed(h, v)
    elif isinstance(value, dict):
        h.update(f"D{len(value)}|".encode())
        for k in sorted(value):
            feed(h, str(k))
            feed(h, value[k])
    elif isinstance(value, np.generic):
        feed(h, value.item())
    elif value is None or isinstance(value, (bool, int, float, str, bytes)):
        r = repr(value).encode()   # float repr is exact (shortest round-trip form)
        h.update(f"S{type(value).__name__}{len(r)}|".encode())
        h.update(r)
    else:
        raise TypeError(f"a value of type {type(value).__name__} cannot be digested")


def content_digest(*values) -> str:
    """32-hex-digit BLAKE2b digest of ``values`` (see :func:`feed`)."""
    h = hashlib.blake2b(digest_size=16)
    feed(h, list(values))
    return h.hexdigest()


def source_digest(*modules) -> str:
    """Digest of the source files of ``modules``: changes whenever their code does."""
    return content_digest([Path(m.__file__).read_bytes() for m in modules])


class ArrayCache:
    """``{name: ndarray}`` entries by key, one ``<key>.npz`` file each in ``directory``.

    Entries are written to a temporary file and renamed, so concurrent writers (threads,
    processes, hosts sharing the work directory) never leave a partial entry; an entry
    that cannot be read (truncated by a full disk, say) counts as missing.
    """

    def __init__(self, directory):
        self.dir = Path(directory)

    def path(self, key: str) -> Path:
        return self.dir / f"{key}.npz"

    def get(self, key: str) -> dict | None:
        path = self.path(key)
        try:
            with np.load(path, allow_pickle=False) as npz:
                return {k: npz[k] for k in npz.files}
        except (FileNotFoundError, NotADirectoryError):
            return None
        except (OSError, ValueError, EOFError, zipfile.BadZipFile):
            try:
                path.unlink(missing_ok=True)
            except OSError:
                pass
            return None

    def put(self, key: str, arrays: dict) -> bool:
        """Keep ``arrays`` under ``key``; False (nothing kept, a warning logged) when the
        directory cannot be written (full disk, read-only): a cache never fails its user."""
        tmp = self.dir / f".{key}.{os.getpid()}.{threading.get_ident()}.tmp"
        try:
            self.dir.mkdir(parents=True, exist_ok=True)
            with open(tmp, "wb") as fh:
                np.savez(fh, **arrays)
            os.replace(tmp, self.path(key))
            return True
        except OSError as exc:
            logging.getLogger("twinfield").warning("%s: could not keep %s (%s)", self.dir, key,
                                                   exc)
            return False
        finally:
            try:
                tmp.unlink(missing_ok=True)
            except OSError:
                pass
