# SPDX-License-Identifier: BSD-3-Clause
"""The Earth-orientation table (UT1 - UTC, polar motion) that astropy uses for sidereal
time, read once per machine instead of once per process.

astropy parses its bundled IERS-A and IERS-B text files on the first sidereal time a
process asks for: 1.1 CPU s, in every helper process of a reduction and every dask
worker. The table it builds is stored here as astropy built it (``QTable.write``, HDF5,
units and metadata kept; the metadata's file paths are those of the install that wrote
it) in ``$TWINFIELD_CACHE_DIR`` (default ``$XDG_CACHE_HOME/twinfield``, else
``~/.cache/twinfield``), under a name made of the astropy and astropy-iers-data versions
and a digest of the two files: other versions or files make another entry, installs of
the same share one. Reading it back takes 0.15 s and gives astropy the same table (tests
compare every column and the sidereal times).

Only astropy's default table is replaced: a table chosen with
``iers.earth_orientation_table.set`` is used as before. Nothing is done where astropy
would not read the bundled files (automatic download on; a ``finals2000A.all`` in the
working directory, which astropy would read instead) or where the cache cannot be
written: astropy then reads its files as usual.
"""

from __future__ import annotations

import contextlib
import functools
import hashlib
import os
import uuid
from pathlib import Path

__all__ = ["cache_dir", "use_cached_table"]


def cache_dir() -> Path:
    """Where the table is kept (``TWINFIELD_CACHE_DIR``, else the user's cache)."""
    explicit = os.environ.get("TWINFIELD_CACHE_DIR")
    if explicit:
        return Path(explicit)
    base = os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache"
    return Path(base) / "twinfield"


def _entry_name() -> str | None:
    """File name of the table for this astropy and its bundled files; None where astropy
    would not read those files."""
    import astropy
    from astropy.utils import iers
    if iers.conf.auto_download or Path("finals2000A.all").exists():
        return None
    try:
        import astropy_iers_data
        data_version = astropy_iers_data.__version__
    except (ImportError, AttributeError):
        data_version = "bundled"
    digest = hashlib.blake2b(digest_size=8)      # 9 MB of text: 0.03 s
    for name in (iers.IERS_A_FILE, iers.IERS_B_FILE):
        digest.update(Path(name).read_bytes())
    return f"earth-orientation-{astropy.__version__}-{data_version}-{digest.hexdigest()}.h5"


@functools.lru_cache(maxsize=None)
def use_cached_table() -> Path | None:
    """Make astropy's default Earth-orientation table the kept one (written first if
    missing). Once per process; returns the entry used, or None (astropy left alone)."""
    from astropy.table import QTable
    from astropy.utils import iers
    if iers.IERS_Auto.iers_table is not None:
        return None                     # astropy already read its files in this process
    name = _entry_name()
    if name is None:
        return None
    path = cache_dir() / name
    try:
        kept = QTable.read(path, path="earth_orientation")
        kept.convert_bytestring_to_unicode()     # HDF5 keeps the flags ('I', 'P', 'B') as bytes
        table = iers.IERS_Auto(kept, copy=False)
    except Exception:                   # missing or unreadable: a cache never stops the work
        table = iers.IERS_Auto.open()   # astropy parses its files, as without this module
        return path if _keep(table, path) else None
    iers.IERS_Auto.iers_table = table   # what IERS_Auto.open() would have made
    return path


def _keep(table, path: Path) -> bool:
    """Write ``table`` to ``path`` under a temporary name, then rename it (a reader never
    sees half a file); False where it cannot be written (a read-only home)."""
    tmp = path.with_name(f".{path.name}.{os.getpid()}-{uuid.uuid4().hex[:8]}.tmp")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        table.write(tmp, path="earth_orientation", serialize_meta=True, format="hdf5")
        os.replace(tmp, path)
        return True
    except OSError:
        return False
    finally:
        with contextlib.suppress(OSError):      # gone after the rename, or never made
            tmp.unlink(missing_ok=True)
