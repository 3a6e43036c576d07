# SPDX-License-Identifier: BSD-3-Clause
"""The night's inventory: every raw file classified from its header alone.

Groups exposures by spectrometer set-up and polarisation mode, associates
calibrations to each on-sky exposure (darks by DIT, lamp frames by set-up,
calibrator stars nearest in time) and reports what is missing, before any
pixel is read.
"""

from __future__ import annotations

from collections import defaultdict
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from .errors import BadInput
from .rawio import ON_SKY_KINDS, RawExposure

__all__ = ["Record", "Inventory", "sci_channel", "dark_label", "ft_dark_label"]


def sci_channel(setup: str, polmode: str) -> str:
    """Science channel label, e.g. ``sci-low-joint``."""
    return f"sci-{setup}-{polmode}"


def dark_label(setup: str, polmode: str, dit: float) -> str:
    """Label of the science-channel dark unit, e.g. ``sci-low-joint-dit1``."""
    return f"{sci_channel(setup, polmode)}-dit{dit:g}"


def ft_dark_label(period: float) -> str:
    """Label of the fringe-tracker dark unit, e.g. ``ft-period1ms``."""
    return f"ft-period{period * 1e3:g}ms"


@dataclass(frozen=True)
class Record:
    """Header facts of one raw exposure (all from the primary header)."""
    path: str
    kind: str
    setup: str
    polmode: str
    dit: float          # s, science frame integration
    nframe: int
    mjd: float          # d, UTC, start
    object: str
    lamptel: int        # 1-4 for lamp-beam, else 0
    caldiam: float      # mas, calibrator uniform-disk diameter (NaN otherwise)
    caldiam_err: float  # mas
    ft_period: float    # s
    expno: int
    ra: float           # deg (NaN when absent)
    dec: float
    ftobject: str
    identity: tuple = field(compare=False)   # (path, size, mtime_ns, header sha256)

    @property
    def name(self) -> str:
        """File stem: the exposure's label in products."""
        return Path(self.path).name.removesuffix(".fits")

    @classmethod
    def from_raw(cls, raw: RawExposure) -> "Record":
        h = raw.header
        return cls(path=raw.path, kind=raw.kind, setup=raw.setup, polmode=raw.polmode,
                   dit=raw.dit, nframe=raw.nframe, mjd=raw.mjd, object=str(h["OBJECT"]),
                   lamptel=int(h["LAMPTEL"]), caldiam=float(h.get("CALDIAM", np.nan)),
                   caldiam_err=float(h.get("CALDIAME", np.nan)),
                   ft_period=float(h["FTPERIOD"]), expno=int(h["EXPNO"]),
                   ra=float(h.get("RA", np.nan)), dec=float(h.get("DEC", np.nan)),
                   ftobject=str(h.get("FTOBJECT", "NONE")), identity=raw.identity())


@dataclass
class Inventory:
    """Every raw file of a night, from headers only.

    Attributes
    ----------
    night_dir : str
    records : list of Record, sorted by start time
    bad : list of (path, problem) for unreadable or invalid files
    """
    night_dir: str
    records: list = field(default_factory=list)
    bad: list = field(default_factory=list)

    @classmethod
    def scan(cls, night_dir, instrument=None) -> "Inventory":
        """Read the primary header of every ``*.fits`` file in ``night_dir`` (not in its
        sub-directories, where a work directory's OIFITS files may live)."""
        night = Path(night_dir).resolve()
        if not night.is_dir():
            raise BadInput(night, "night directory not found")
        inv = cls(str(night))
        paths = sorted(night.glob("*.fits"))
        if not paths:
            raise BadInput(night, "no raw files (*.fits) in the night directory")
        seen = {}      # primary-header hash -> first file: a copied file is one exposure
        for path in paths:
            try:
                rec = Record.from_raw(RawExposure(path, instrument))
            except BadInput as exc:
                inv.bad.append((exc.path, exc.problem))
                continue
            first = seen.setdefault(rec.identity[3], rec.path)
            if first != rec.path:
                inv.bad.append((rec.path, f"duplicate of {Path(first).name} (identical primary "
                                          "header); ignored"))
            else:
                inv.records.append(rec)
        inv.records.sort(key=lambda r: (r.mjd, r.expno, r.path))
        return inv

    # -- selection --------------------------------------------------------------
    def select(self, kind=None, setup=None, polmode=None, dit=None) -> list:
        """Records matching every given criterion (kind may be a tuple)."""
        kinds = (kind,) if isinstance(kind, str) else kind
        return [r for r in self.records
                if (kinds is None or r.kind in kinds) and (setup is None or r.setup == setup)
                and (polmode is None or r.polmode == polmode)
                and (dit is None or np.isclose(r.dit, dit, rtol=1e-6))]

    def record(self, path) -> Record:
        path = str(Path(path).resolve())
        for r in self.records:
            if r.path == path:
                return r
        raise KeyError(path)

    def channels(self) -> list[tuple[str, str]]:
        """(setup, polmode) pairs that have any non-dark exposure, sorted."""
        return sorted({(r.setup, r.polmode) for r in self.records if r.kind != "dark"})

    def dark_groups(self) -> dict:
        """(setup, polmode, dit) -> dark records of the science channel."""
        groups = defaultdict(list)
        for r in self.select("dark"):
            groups[(r.setup, r.polmode, _round(r.dit))].append(r)
        return dict(sorted(groups.items()))

    def ft_dark_groups(self) -> dict:
        """FT frame period (s) -> dark records (every dark also reads the fringe tracker)."""
        groups = defaultdict(list)
        for r in self.select("dark"):
            groups[_round(r.ft_period)].append(r)
        return dict(sorted(groups.items()))

    # -- association ------------------------------------------------------------
    def dark_for(self, rec: Record):
        """Key (setup, polmode, dit) of the dark group for ``rec``, or None.

        Same set-up and DIT; the same polarisation mode preferred (the detector
        window depends on the set-up only)."""
        groups = self.dark_groups()
        key = (rec.setup, rec.polmode, _round(rec.dit))
        if key in groups:
            return key
        for k in groups:
            if k[0] == rec.setup and k[2] == key[2]:
                return k
        return None

    def ft_dark_for(self, rec: Record):
        key = _round(rec.ft_period)
        return key if key in self.ft_dark_groups() else None

    def calibrators_for(self, rec: Record, n: int = 2) -> list:
        """The ``n`` calibrator exposures of the same channel nearest in time."""
        cals = self.select("calibrator", rec.setup, rec.polmode)
        return sorted(cals, key=lambda c: abs(c.mjd - rec.mjd))[:n]

    def calibrations_for(self, rec: Record) -> dict:
        """What ``rec`` will be reduced with: a mapping role -> records or key."""
        s, p = rec.setup, rec.polmode
        return {"dark": self.dark_for(rec), "ft_dark": self.ft_dark_for(rec),
                "flat": self.select("flat", s, p), "lamp-beam": self.select("lamp-beam", s, p),
                "lamp-scan": self.select("lamp-scan", s, p),
                "calibrator": self.calibrators_for(rec) if rec.kind == "science" else []}

    def problems(self) -> list[tuple[str, str]]:
        """(path, message) for every exposure lacking a calibration it needs."""
        out = []
        for rec in self.records:
            if rec.kind == "dark":
                continue
            cal = self.calibrations_for(rec)
            ch = f"set-up {rec.setup!r}, polarisation {rec.polmode!r}"
            if cal["dark"] is None:
                out.append((rec.path, f"no dark of DIT {rec.dit:g} s in set-up {rec.setup!r}"))
            if cal["ft_dark"] is None:
                out.append((rec.path, f"no dark with fringe-tracker period {rec.ft_period:g} s"))
            if rec.kind not in ON_SKY_KINDS:
                continue
            if not cal["flat"]:
                out.append((rec.path, f"no flat in {ch}"))
            lit = {r.lamptel for r in cal["lamp-beam"]}
            if lit != {1, 2, 3, 4}:
                out.append((rec.path, f"lamp-beam frames in {ch} light beams {sorted(lit)}, "
                                      "need 1-4"))
            if not cal["lamp-scan"]:
                out.append((rec.path, f"no lamp-scan in {ch}"))
            if rec.kind == "science" and not cal["calibrator"]:
                out.append((rec.path, f"no calibrator star in {ch}"))
        return out

    # -- output -----------------------------------------------------------------
    def table(self) -> np.ndarray:
        """Records as a numpy structured array (one row per file)."""
        names = ["path", "kind", "setup", "polmode", "dit", "nframe", "mjd", "object",
                 "lamptel", "caldiam", "caldiam_err", "ft_period", "expno", "ra", "dec",
                 "ftobject"]
        rows = [tuple(asdict(r)[n] for n in names) for r in self.records]
        strlen = {n: max([len(str(row[i])) for row in rows] + [1])
                  for i, n in enumerate(names)}
        types = {"dit": "f8", "nframe": "i8", "mjd": "f8", "lamptel": "i8", "caldiam": "f8",
                 "caldiam_err": "f8", "ft_period": "f8", "expno": "i8", "ra": "f8", "dec": "f8"}
        dtype = [(n, types.get(n, f"U{strlen[n]}")) for n in names]
        return np.array(rows, dtype=dtype)

    def report(self) -> str:
        """A plain-text account for observers: files by kind and set-up, associations,
        what is missing."""
        lines = [f"Night {self.night_dir}: {len(self.records)} exposures, "
                 f"{len(self.bad)} unreadable"]
        for setup, pol in sorted({(r.setup, r.polmode) for r in self.records}):
            lines.append(f"\nSet-up {setup}, polarisation {pol}:")
            recs = self.select(setup=setup, polmode=pol)
            for kind in ("dark", "flat", "pixel-flat", "lamp-beam", "lamp-scan", "sky",
                         "calibrator", "science"):
                ks = [r for r in recs if r.kind == kind]
                if ks:
                    dits = sorted({r.dit for r in ks})
                    lines.append(f"  {kind:<11s}{len(ks):4d} file(s), DIT "
                                 f"{', '.join(f'{d:g}' for d in dits)} s")
        on_sky = self.select(("science", "calibrator", "sky"))
        if on_sky:
            lines.append("\nCalibrations used by each on-sky exposure:")
        for rec in on_sky:
            cal = self.calibrations_for(rec)
            dk = cal["dark"]
            parts = [f"dark {dark_label(*dk) if dk else 'MISSING'}",
                     f"ft dark {ft_dark_label(cal['ft_dark']) if cal['ft_dark'] else 'MISSING'}",
                     f"flat {len(cal['flat'])}", f"lamp-beam {len(cal['lamp-beam'])}",
                     f"lamp-scan {len(cal['lamp-scan'])}"]
            if rec.kind == "science":
                cals = ", ".join(Path(c.path).name for c in cal["calibrator"]) or "MISSING"
                parts.append(f"calibrators {cals}")
            lines.append(f"  {Path(rec.path).name} ({rec.kind}, {rec.object}, "
                         f"{rec.setup}/{rec.polmode}, DIT {rec.dit:g} s): " + "; ".join(parts))
        problems = self.problems()
        if problems or self.bad:
            lines.append("\nProblems:")
            lines += [f"  UNREADABLE {p}: {msg}" for p, msg in self.bad]
            lines += [f"  MISSING {Path(p).name}: {msg}" for p, msg in problems]
        else:
            lines.append("\nNothing missing.")
        return "\n".join(lines)


def _round(x: float) -> float:
    """DIT / period as a grouping key (robust to float noise in headers)."""
    return float(f"{x:.6g}")
