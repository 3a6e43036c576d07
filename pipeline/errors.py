# SPDX-License-Identifier: BSD-3-Clause
"""The small, named error taxonomy of twinfield.

Every message names the file or argument, what was expected, what was found,
and where possible the fix.
"""

from __future__ import annotations

__all__ = ["TwinfieldError", "BadInput", "ConfigError", "FitFailed", "NothingToDo",
           "MissingCalibration", "TwinfieldWarning"]


class TwinfieldError(Exception):
    """Base class of every error twinfield raises on purpose."""


class BadInput(TwinfieldError, ValueError):
    """A raw file or product is unusable; its branch of the night fails, the rest goes on.

    Parameters
    ----------
    path : str or os.PathLike
        The file at fault.
    problem : str
        What is wrong with it, in one line.
    """

    def __init__(self, path, problem: str):
        self.path = str(path)
        self.problem = problem
        super().__init__(f"{self.path}: {problem}")

    def __reduce__(self):  # keep pickling (dask processes) faithful
        return (type(self), (self.path, self.problem))


class MissingCalibration(BadInput):
    """A science or calibrator exposure has no calibration of its set-up."""


class ConfigError(TwinfieldError, ValueError):
    """A configuration or instrument-model file is wrong; raised before any heavy work."""

    def __init__(self, source, problem: str):
        self.source = str(source)
        self.problem = problem
        super().__init__(f"{self.source}: {problem}")

    def __reduce__(self):
        return (type(self), (self.source, self.problem))


class FitFailed(TwinfieldError, RuntimeError):
    """A fit did not converge or had too few points for its free parameters."""

    def __init__(self, what: str, *, n_points: int, n_free: int, chi2: float = float("nan")):
        self.what, self.n_points, self.n_free, self.chi2 = what, n_points, n_free, chi2
        super().__init__(f"{what}: fit failed with {n_points} points, {n_free} free "
                         f"parameters, chi2={chi2:.4g}")

    def __reduce__(self):
        return (_rebuild_fit_failed, (self.what, self.n_points, self.n_free, self.chi2))


def _rebuild_fit_failed(what, n_points, n_free, chi2):
    return FitFailed(what, n_points=n_points, n_free=n_free, chi2=chi2)


class NothingToDo(TwinfieldError):
    """A legitimate skip (e.g. no split-polarisation frames tonight); recorded in provenance."""


class TwinfieldWarning(UserWarning):
    """The one warning class of the package."""
