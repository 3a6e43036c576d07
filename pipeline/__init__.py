# SPDX-License-Identifier: BSD-3-Clause
"""twinfield: dual-field interferometric night reduction to binary astrometry."""

from importlib.metadata import PackageNotFoundError, version as _version

try:
    __version__ = _version("twinfield")
except PackageNotFoundError:  # running from a source tree
    __version__ = "0.0.0+source"

# No network at run time: astropy must use the bundled Earth-orientation tables.
from astropy.utils import iers as _iers

_iers.conf.auto_download = False
_iers.conf.auto_max_age = None
