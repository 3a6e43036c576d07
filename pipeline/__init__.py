# SPDX-License-Identifier: BSD-3-Clause
"""twinfield: dual-field interferometric night reduction to binary astrometry."""

import os as _os
from importlib.metadata import PackageNotFoundError, version as _version

# Parallelism comes from dask (one task per core); BLAS threads inside each task would
# oversubscribe the cores (measured: a batched eigh costs 30x more CPU with 2 BLAS
# threads per task on 2 cores, docs/benchmarks.md). Set before numpy loads BLAS; an
# explicit setting in the environment wins.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    _os.environ.setdefault(_var, "1")

try:
    __version__ = _version("twinfield")
except PackageNotFoundError:  # running from a source tree
    __version__ = "0.0.0+source"

# No network at run time: astropy must use the bundled Earth-orientation tables.
from astropy.utils import iers as _iers

_iers.conf.auto_download = False
_iers.conf.auto_max_age = None
