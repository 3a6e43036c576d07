# SPDX-License-Identifier: BSD-3-Clause
"""Stage ``wavecal``: effective wavelength and bandwidth of every spectral pixel from the
lamp delay scan (Fourier-transform spectroscopy), smooth law per trace, common grid;
one unit per science set-up and polarisation mode, and one for the fringe tracker."""

from __future__ import annotations

from dataclasses import dataclass

from pipeline.errors import MissingCalibration
from pipeline.inventory import Inventory, ft_dark_label, sci_channel
from pipeline.lampcal import wavecal_ft, wavecal_science
from pipeline.stage import Stage, Unit
from recipes.flat import needs_dark


@dataclass(frozen=True)
class WavecalParams:
    law_deg: int = 3                # polynomial degree of lambda(x), science traces
    ft_law_deg: int = 2             # ... fringe-tracker outputs (few pixels)
    min_snr: float = 5.0            # pixels with a weaker fringe get no wavelength
    max_bw_rel_err: float = 0.02    # poorer per-trace bandwidths adopt the channel median
    min_envelope_decay: float = 0.0   # ... as do traces whose scan sees less envelope drop
    window: float = 2.0             # fit |OPD| < window x nominal coherence length, science
    ft_window: float = 0.6          # ... fringe tracker (central fringe packet only)
    frames_per_chunk: int = 16      # frames read at a time (bounded memory)

    def __post_init__(self):
        if not (0 <= self.law_deg <= 6 and 0 <= self.ft_law_deg <= 4):
            raise ValueError("wavecal law degrees must be in 0..6 (ft 0..4)")
        if self.window <= 0 or self.ft_window <= 0:
            raise ValueError("wavecal windows must be positive (coherence lengths)")
        if not 0 <= self.min_envelope_decay < 1:
            raise ValueError("wavecal needs 0 <= min_envelope_decay < 1")
        if self.min_snr <= 0 or not 0 < self.max_bw_rel_err < 1 or self.frames_per_chunk < 1:
            raise ValueError("wavecal needs min_snr > 0, 0 < max_bw_rel_err < 1, "
                             "frames_per_chunk >= 1")


def ft_scan_record(inventory: Inventory):
    """The delay scan used for the fringe tracker: the longest one of the night."""
    scans = inventory.select("lamp-scan")
    return max(scans, key=lambda r: (r.nframe * r.dit, -r.mjd)) if scans else None


def plan(inventory: Inventory, params: WavecalParams, upstream) -> list[Unit]:
    flats = {u.label for u in upstream.get("flat", [])}
    units = []
    for setup, polmode in inventory.channels():
        recs = inventory.select("lamp-scan", setup, polmode)
        label = sci_channel(setup, polmode)
        if not recs or label not in flats:
            continue
        needs, problem = needs_dark(inventory, recs[-1:])
        units.append(Unit(label=label, raw=(recs[-1].path,), needs={**needs, "flat": ("flat", label)},
                          meta={"channel": "sci", "setup": setup, "polmode": polmode,
                                "problem": list(problem or ())}))
    rec = ft_scan_record(inventory)
    if rec is not None:
        key = inventory.ft_dark_for(rec)
        problem = [] if key else [rec.path, f"no dark with FT period {rec.ft_period:g} s"]
        units.append(Unit(label="ft", raw=(rec.path,), meta={"channel": "ft", "problem": problem},
                          needs={"ft_dark": ("dark", ft_dark_label(key))} if key else {}))
    return units


def run(inputs, params: WavecalParams) -> dict:
    meta, p = inputs.unit.meta, inputs.products
    if meta["problem"]:
        raise MissingCalibration(*meta["problem"])
    kw = dict(instrument=inputs.instrument, min_snr=params.min_snr,
              max_bw_rel_err=params.max_bw_rel_err, min_envelope_decay=params.min_envelope_decay)
    if meta["channel"] == "ft":
        return wavecal_ft(inputs.raw[0], p["ft_dark"], window=params.ft_window,
                          law_deg=params.ft_law_deg, **kw)
    return wavecal_science(inputs.raw[0], p["dark"], p["flat"], setup_name=meta["setup"],
                           polmode=meta["polmode"], window=params.window, law_deg=params.law_deg,
                           frames_per_chunk=params.frames_per_chunk, **kw)


STAGE = Stage(name="wavecal", version="8", params=WavecalParams, after=("dark", "flat"),
              granularity="setup", plan=plan, run=run, apart=True,
              doc="effective wavelengths and bandwidths from delay scans, common grid")
