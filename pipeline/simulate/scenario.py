# SPDX-License-Identifier: BSD-3-Clause
"""Scenario files (``calib/scenarios/<name>.toml``): what night to simulate.

A scenario lists the targets, the on-sky sequence and the knobs of the forward
model (atmosphere, fringe tracking, injection, metrology, instrument errors,
lamps). Afternoon calibrations (darks for every DIT used, flat, single-beam
lamp frames and the delay scan of every set-up used) are added by
:func:`pipeline.simulate.plan.plan_night` from ``[calibration]``.
Every field is documented in ``docs/truth.md``.
"""

from __future__ import annotations

import os
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from ..config import require_field as _req
from ..errors import ConfigError
from ..instrument import CALIB_DIR

__all__ = ["Scenario", "Target", "Exposure", "load_scenario", "SCENARIO_DIR"]

SCENARIO_DIR = CALIB_DIR / "scenarios"

ON_SKY = ("sky", "calibrator", "science")
KINDS = ("dark", "flat", "pixel-flat", "lamp-beam", "lamp-scan") + ON_SKY


@dataclass(frozen=True)
class Target:
    """A science field (or calibrator) and its fringe-tracker star.

    Offsets are in mas: x = dRA cos(Dec) East, y = dDec North.
    """
    name: str
    ra_deg: float
    dec_deg: float
    kmag: float                      # K magnitude of the primary (or of the single star)
    primary_offset_mas: tuple[float, float]   # primary minus commanded pointing
    companion_mas: tuple[float, float] | None  # companion minus primary; None: single
    companion_dkmag: float           # K(companion) - K(primary)
    diameter_mas: float              # true uniform-disk diameter of the primary
    cal_diameter_mas: float          # catalogue diameter (calibrators), 0 otherwise
    cal_diameter_err_mas: float
    ft_name: str
    ft_offset_arcsec: tuple[float, float]     # FT star minus science pointing (E, N)
    ft_kmag: float

    @property
    def flux_ratio(self) -> float:
        """Companion / primary flux on the sky (before fibre coupling), 0 for a single star."""
        return 0.0 if self.companion_mas is None else 10 ** (-0.4 * self.companion_dkmag)


@dataclass(frozen=True)
class Exposure:
    """One raw file to write."""
    kind: str
    setup: str
    polmode: str
    dit: float
    nframe: int
    target: str = ""        # on-sky kinds
    lamp_beam: int = 0      # lamp-beam: 1..4
    gap_s: float = 60.0     # idle time before the exposure starts


@dataclass(frozen=True)
class Scenario:
    name: str
    source: str
    description: str
    start_utc: str                 # UTC of the first on-sky exposure
    calib_start_utc: str           # UTC of the first afternoon calibration
    targets: dict
    sequence: tuple[Exposure, ...]
    calibration: dict              # per set-up lamp DITs and frame counts, dark frames
    photometry: dict
    injection: dict
    tracking: dict
    metrology: dict
    errors: dict
    lamp: dict
    detector: dict
    ambient: dict
    sampling: dict = field(default_factory=dict)


_DEFAULTS = {
    "photometry": {"throughput": 0.01, "ft_throughput": 0.01,
                   "sky_background_per_nm": 0.5},
    "injection": {"mean": 0.45, "log_sigma": 0.25, "corr_ms": 40.0},
    "tracking": {"residual_rms_nm": 200.0, "corr_ms": 20.0,
                 "jump_rate_per_min": 1.0, "jump_duration_s": [0.2, 1.0],
                 "lockloss_rate_per_min": 0.5, "lockloss_duration_s": [0.05, 0.3],
                 "lockloss_scramble_um": 5.0},
    "metrology": {"drift_um": 1.0, "noise_nm": 2.0, "sample_period_s": 0.001,
                  "zero_offset_um": 50.0},
    "errors": {"transmission_scatter": 0.2, "transmission_chromatic": 0.05,
               "phase_error_deg": 10.0, "contrast_range": [0.8, 0.98],
               "trace_offset_px": 0.3, "trace_tilt_px": 1.0, "trace_curvature_px": 0.4,
               "trace_sigma_scatter": 0.05, "dispersion_shift_px": 1.0,
               "dispersion_scale": 0.005, "dispersion_quad_px": 0.3, "lsf_scatter": 0.05, "pixel_response_rms": 0.02,
               "ft_wave_shift_px": 0.2, "ft_pixel_response_rms": 0.02},
    "lamp": {"temperature_k": 3000.0, "photon_rate_per_nm": 2.0e5, "beam_scatter": 0.1,
             "ft_factor": 1.0},
    "detector": {"bias_pattern_adu": 3.0, "hot_dark_e_per_s": [20.0, 500.0],
                 "cosmic_e": 3000.0},
    "ambient": {"temperature_c": 11.0, "pressure_hpa": 880.0, "humidity_pct": 18.0,
                "seeing_arcsec": 0.8, "coherence_time_ms": 5.0},
    "sampling": {"sub_samples": 13, "ft_sub_samples": 7, "chunk_frames": 16,
                 "calib_ft_max_s": 2.0},
}


def _merge(section: str, given: dict, src: str) -> dict:
    base = dict(_DEFAULTS[section])
    for key, value in given.items():
        if key not in base:
            raise ConfigError(src, f"unknown field '{section}.{key}'; known: {sorted(base)}")
        if isinstance(base[key], float) and isinstance(value, int) and not isinstance(value, bool):
            value = float(value)
        if type(value) is not type(base[key]):
            raise ConfigError(src, f"field '{section}.{key}' should be "
                                   f"{type(base[key]).__name__}, found {value!r}")
        base[key] = value
    return base


def _pair(value, src, where) -> tuple[float, float]:
    if not (isinstance(value, list) and len(value) == 2):
        raise ConfigError(src, f"field '{where}' needs two numbers [East, North]")
    return float(value[0]), float(value[1])


def _target(t: dict, n: int, src: str) -> Target:
    w = f"targets[{n}]."
    comp = t.get("companion_mas")
    return Target(
        name=_req(t, "name", str, src, w), ra_deg=_req(t, "ra_deg", float, src, w),
        dec_deg=_req(t, "dec_deg", float, src, w), kmag=_req(t, "kmag", float, src, w),
        primary_offset_mas=_pair(t.get("primary_offset_mas", [0.0, 0.0]), src,
                                 w + "primary_offset_mas"),
        companion_mas=None if comp is None else _pair(comp, src, w + "companion_mas"),
        companion_dkmag=float(t.get("companion_dkmag", 0.0)),
        diameter_mas=float(t.get("diameter_mas", 0.0)),
        cal_diameter_mas=float(t.get("cal_diameter_mas", 0.0)),
        cal_diameter_err_mas=float(t.get("cal_diameter_err_mas", 0.0)),
        ft_name=_req(t, "ft_name", str, src, w),
        ft_offset_arcsec=_pair(_req(t, "ft_offset_arcsec", list, src, w), src,
                               w + "ft_offset_arcsec"),
        ft_kmag=_req(t, "ft_kmag", float, src, w))


def _resolve(scenario) -> Path:
    p = Path(os.fspath(scenario))
    if p.suffix == ".toml" or p.parent != Path("."):
        return p
    return SCENARIO_DIR / f"{p.name}.toml"


def load_scenario(scenario: str | os.PathLike = "tiny") -> Scenario:
    """Read a scenario by name (``calib/scenarios/<name>.toml``) or by path.

    Raises
    ------
    ConfigError
        Naming the file and the field when anything is missing or wrong.
    """
    path = _resolve(scenario)
    src = str(path)
    try:
        with open(path, "rb") as fh:
            d = tomllib.load(fh)
    except FileNotFoundError:
        known = sorted(p.stem for p in SCENARIO_DIR.glob("*.toml"))
        raise ConfigError(src, f"scenario file not found (known scenarios: {known})") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(src, f"not valid TOML: {exc}") from None
    for section in ("targets", "sequence", "calibration"):
        if section not in d:
            raise ConfigError(src, f"missing section [{section}]")
    targets = {}
    for n, t in enumerate(d["targets"]):
        tg = _target(t, n, src)
        targets[tg.name] = tg
    seq = []
    for n, e in enumerate(d["sequence"]):
        w = f"sequence[{n}]."
        kind = _req(e, "kind", str, src, w)
        if kind not in ON_SKY:
            raise ConfigError(src, f"field '{w}kind' must be one of {ON_SKY} (calibrations "
                                   f"are planned from [calibration]), found {kind!r}")
        target = _req(e, "target", str, src, w)
        if target not in targets:
            raise ConfigError(src, f"field '{w}target' names no target: {target!r} "
                                   f"(sky exposures name the target they are taken near)")
        seq.append(Exposure(kind=kind, setup=_req(e, "setup", str, src, w),
                            polmode=e.get("polmode", "joint"), dit=_req(e, "dit", float, src, w),
                            nframe=_req(e, "nframe", int, src, w), target=target,
                            gap_s=float(e.get("gap_s", 60.0))))
    cal = d["calibration"]
    for setup, c in cal.items():
        if not isinstance(c, dict):
            continue
        for key in ("lamp_dit", "flat_nframe", "beam_nframe", "scan_dit", "scan_nframe",
                    "scan_step_um"):
            _req(c, key, float if key in ("lamp_dit", "scan_dit", "scan_step_um") else int,
                 src, f"calibration.{setup}.")
        for key, typ in (("pixel_flat_nframe", int), ("pixel_flat_e", float)):   # optional
            if key in c:
                _req(c, key, typ, src, f"calibration.{setup}.")
    return Scenario(
        name=_req(d, "name", str, src, ""), source=src, description=d.get("description", ""),
        start_utc=_req(d, "start_utc", str, src, ""),
        calib_start_utc=_req(d, "calib_start_utc", str, src, ""),
        targets=targets, sequence=tuple(seq), calibration=cal,
        **{s: _merge(s, d.get(s, {}), src) for s in _DEFAULTS})
