# SPDX-License-Identifier: BSD-3-Clause
"""The instrument model: site, stations, combiner, spectrometer set-ups, detectors.

Loaded from ``calib/instrument.toml`` into frozen dataclasses. Shared by the
simulator (which perturbs it into a "true" instrument) and the reduction (which
calibrates the true instrument from lamp frames and uses the nominal model only
for layout and first guesses).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Literal

import numpy as np

from .config import read_toml
from .config import require_field as _get
from .errors import ConfigError

__all__ = ["Site", "Station", "Combiner", "Setup", "Detector", "FringeTracker", "Instrument",
           "load_instrument", "DEFAULT_INSTRUMENT", "CALIB_DIR"]

CALIB_DIR = Path(__file__).resolve().parent.parent / "calib"
DEFAULT_INSTRUMENT = CALIB_DIR / "instrument.toml"

Polarisation = Literal["joint", "split"]


@dataclass(frozen=True)
class Site:
    name: str
    latitude_deg: float
    longitude_deg: float
    altitude_m: float

    def earth_location(self):
        from astropy.coordinates import EarthLocation
        import astropy.units as u
        return EarthLocation.from_geodetic(self.longitude_deg * u.deg, self.latitude_deg * u.deg,
                                           self.altitude_m * u.m)


@dataclass(frozen=True)
class Station:
    name: str
    enu_m: tuple[float, float, float]


@dataclass(frozen=True)
class Combiner:
    """Pairwise 4-telescope combiner with 24 phase-stepped outputs.

    Output ``k`` samples baseline ``k // 4`` with nominal phase ``nominal_phase_deg[k % 4]``.
    """
    baselines: tuple[tuple[int, int], ...]
    nominal_phase_deg: tuple[float, ...]
    nominal_transmission: float
    nominal_contrast: float

    @property
    def n_output(self) -> int:
        return len(self.baselines) * len(self.nominal_phase_deg)

    @cached_property
    def output_baseline(self) -> np.ndarray:
        """Baseline index of each output, shape (n_output,)."""
        return np.repeat(np.arange(len(self.baselines)), len(self.nominal_phase_deg))

    @cached_property
    def output_pair(self) -> np.ndarray:
        """Telescope pair (i, j) of each output, shape (n_output, 2), int."""
        return np.asarray(self.baselines)[self.output_baseline]

    @cached_property
    def output_nominal_phase_rad(self) -> np.ndarray:
        """Nominal phase shift of each output, shape (n_output,), radians."""
        return np.deg2rad(np.tile(self.nominal_phase_deg, len(self.baselines)))

    @cached_property
    def triangles(self) -> tuple[tuple[int, int, int], ...]:
        """Closure triangles (i, j, k) with i < j < k, telescopes 0-based."""
        return ((0, 1, 2), (0, 1, 3), (0, 2, 3), (1, 2, 3))

    def baseline_index(self, i: int, j: int) -> int:
        """Index of baseline (i, j), i < j."""
        return self.baselines.index((i, j))


@dataclass(frozen=True)
class Detector:
    name: str
    gain_e_per_adu: float
    bias_adu: float
    read_noise_e: float
    dark_current_e_per_s: float
    saturation_adu: int
    hot_pixel_fraction: float
    dead_pixel_fraction: float
    cosmic_rate_per_px_s: float
    n_y: int = 0
    n_x_max: int = 0


@dataclass(frozen=True)
class Setup:
    """A science-spectrometer set-up (spectral resolution)."""
    name: str
    resolution: float
    n_x: int
    x_centre_px: float
    wave_centre_m: float
    dispersion_m_per_px: float
    channel_fwhm_px: float
    trace_y0_px: float
    trace_spacing_px: float
    trace_sigma_px: float
    polarisation: tuple[str, ...]

    def nominal_wavelength_m(self, x=None) -> np.ndarray:
        """Nominal vacuum wavelength of pixel column x (default: every column), metres."""
        x = np.arange(self.n_x) if x is None else np.asarray(x, float)
        return self.wave_centre_m + self.dispersion_m_per_px * (x - self.x_centre_px)

    def n_pol(self, polarisation: str) -> int:
        return 2 if polarisation == "split" else 1

    def nominal_trace_y(self, output: int, pol: int = 0, polarisation: str = "joint") -> float:
        """Nominal y of a trace's centre, pixels."""
        if polarisation == "split":
            return self.trace_y0_px + (2 * output + pol) * self.trace_spacing_px / 2
        return self.trace_y0_px + output * self.trace_spacing_px


@dataclass(frozen=True)
class FringeTracker:
    n_wave: int
    wave_min_m: float
    wave_max_m: float
    frame_period_s: float
    channel_fwhm_px: float
    detector: str

    def nominal_wavelength_m(self) -> np.ndarray:
        """Nominal vacuum wavelength of each fringe-tracker spectral pixel, metres."""
        return np.linspace(self.wave_min_m, self.wave_max_m, self.n_wave)


@dataclass(frozen=True)
class Instrument:
    name: str
    site: Site
    stations: tuple[Station, ...]
    telescope_diameter_m: float
    fibre_fwhm_mas_at_2p2um: float
    combiner: Combiner
    metrology_wavelength_m: float
    fringe_tracker: FringeTracker
    detectors: dict = field(hash=False)
    setups: dict = field(hash=False)
    source: str = ""

    @property
    def n_telescope(self) -> int:
        return len(self.stations)

    @cached_property
    def station_enu_m(self) -> np.ndarray:
        """Station positions, shape (n_telescope, 3) East/North/Up metres."""
        return np.array([s.enu_m for s in self.stations], float)

    @cached_property
    def baseline_enu_m(self) -> np.ndarray:
        """Baseline vectors B_ij = P_j - P_i, shape (n_baseline, 3), ENU metres."""
        p = self.station_enu_m
        return np.array([p[j] - p[i] for i, j in self.combiner.baselines])

    def setup(self, name: str) -> Setup:
        try:
            return self.setups[name]
        except KeyError:
            raise ConfigError(self.source, f"no spectrometer set-up named {name!r}; "
                                           f"known: {sorted(self.setups)}") from None


def _positive(value: float, source: str, name: str) -> float:
    if not np.isfinite(value) or value <= 0:
        raise ConfigError(source, f"field '{name}' must be positive, found {value!r}")
    return value


def _detector(name: str, d: dict, src: str) -> Detector:
    w = f"detectors.{name}."
    kw = {k: _get(d, k, typ, src, w) for k, typ in [
        ("gain_e_per_adu", float), ("bias_adu", float), ("read_noise_e", float),
        ("dark_current_e_per_s", float), ("saturation_adu", int), ("hot_pixel_fraction", float),
        ("dead_pixel_fraction", float), ("cosmic_rate_per_px_s", float)]}
    _positive(kw["gain_e_per_adu"], src, w + "gain_e_per_adu")
    if not 0 < kw["saturation_adu"] <= 65535:
        raise ConfigError(src, f"field '{w}saturation_adu' must be in 1..65535 (16-bit raw)")
    return Detector(name=name, n_y=int(d.get("n_y", 0)), n_x_max=int(d.get("n_x_max", 0)), **kw)


def _setup(name: str, d: dict, src: str) -> Setup:
    w = f"setups.{name}."
    kw = {k: _get(d, k, typ, src, w) for k, typ in [
        ("resolution", float), ("n_x", int), ("x_centre_px", float), ("wave_centre_m", float),
        ("dispersion_m_per_px", float), ("channel_fwhm_px", float), ("trace_y0_px", float),
        ("trace_spacing_px", float), ("trace_sigma_px", float), ("polarisation", list)]}
    for k in ("resolution", "n_x", "wave_centre_m", "channel_fwhm_px", "trace_spacing_px",
              "trace_sigma_px"):
        _positive(kw[k], src, w + k)
    pols = tuple(kw.pop("polarisation"))
    if not pols or set(pols) - {"joint", "split"}:
        raise ConfigError(src, f"field '{w}polarisation' must list 'joint' and/or 'split', "
                               f"found {list(pols)}")
    setup = Setup(name=name, polarisation=pols, **kw)
    wave = setup.nominal_wavelength_m()
    if wave.min() < 1.8e-6 or wave.max() > 2.6e-6:
        raise ConfigError(src, f"set-up {name!r} spans {wave.min()*1e6:.3f}-{wave.max()*1e6:.3f} um, "
                               "outside the K band this instrument is built for")
    return setup


def load_instrument(path=DEFAULT_INSTRUMENT) -> Instrument:
    """Read and validate an instrument-model TOML file.

    Raises
    ------
    ConfigError
        Naming the file and the field when anything is missing, of the wrong type
        or out of range.
    """
    src = str(path)
    d = read_toml(path, "instrument model file")

    for section in ("site", "stations", "telescope", "combiner", "metrology", "fringe_tracker",
                    "detectors", "setups"):
        if section not in d:
            raise ConfigError(src, f"missing section [{section}]")
    s = d["site"]
    site = Site(name=_get(s, "name", str, src, "site."),
                latitude_deg=_get(s, "latitude_deg", float, src, "site."),
                longitude_deg=_get(s, "longitude_deg", float, src, "site."),
                altitude_m=_get(s, "altitude_m", float, src, "site."))
    if not -90 <= site.latitude_deg <= 90:
        raise ConfigError(src, f"field 'site.latitude_deg' out of range: {site.latitude_deg}")
    stations = []
    for n, st in enumerate(d["stations"]):
        enu = _get(st, "enu_m", list, src, f"stations[{n}].")
        if len(enu) != 3:
            raise ConfigError(src, f"field 'stations[{n}].enu_m' needs 3 numbers (E, N, U)")
        stations.append(Station(_get(st, "name", str, src, f"stations[{n}]."),
                                tuple(float(v) for v in enu)))
    c = d["combiner"]
    baselines = tuple(tuple(int(i) for i in b) for b in _get(c, "baselines", list, src, "combiner."))
    nst = len(stations)
    expected = tuple((i, j) for i in range(nst) for j in range(i + 1, nst))
    if baselines != expected:
        raise ConfigError(src, f"field 'combiner.baselines' must list every pair i<j of the "
                               f"{nst} stations in order {list(expected)}, found {list(baselines)}")
    combiner = Combiner(
        baselines=baselines,
        nominal_phase_deg=tuple(float(v) for v in _get(c, "nominal_phase_deg", list, src, "combiner.")),
        nominal_transmission=_get(c, "nominal_transmission", float, src, "combiner."),
        nominal_contrast=_get(c, "nominal_contrast", float, src, "combiner."))
    f = d["fringe_tracker"]
    ft = FringeTracker(n_wave=_get(f, "n_wave", int, src, "fringe_tracker."),
                       wave_min_m=_get(f, "wave_min_m", float, src, "fringe_tracker."),
                       wave_max_m=_get(f, "wave_max_m", float, src, "fringe_tracker."),
                       frame_period_s=_get(f, "frame_period_s", float, src, "fringe_tracker."),
                       channel_fwhm_px=_get(f, "channel_fwhm_px", float, src, "fringe_tracker."),
                       detector=_get(f, "detector", str, src, "fringe_tracker."))
    _positive(ft.frame_period_s, src, "fringe_tracker.frame_period_s")
    detectors = {name: _detector(name, dd, src) for name, dd in d["detectors"].items()}
    if "science" not in detectors or ft.detector not in detectors:
        raise ConfigError(src, "section [detectors] needs 'science' and the fringe tracker's "
                               f"detector {ft.detector!r}")
    setups = {name: _setup(name, sd, src) for name, sd in d["setups"].items()}
    t = d["telescope"]
    return Instrument(
        name=_get(d, "name", str, src, ""), site=site, stations=tuple(stations),
        telescope_diameter_m=_positive(_get(t, "diameter_m", float, src, "telescope."), src,
                                       "telescope.diameter_m"),
        fibre_fwhm_mas_at_2p2um=_positive(_get(t, "fibre_fwhm_mas_at_2p2um", float, src,
                                               "telescope."), src, "telescope.fibre_fwhm_mas_at_2p2um"),
        combiner=combiner,
        metrology_wavelength_m=_positive(_get(d["metrology"], "laser_vacuum_wavelength_m", float,
                                              src, "metrology."), src,
                                         "metrology.laser_vacuum_wavelength_m"),
        fringe_tracker=ft, detectors=detectors, setups=setups, source=src)
