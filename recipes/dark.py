# SPDX-License-Identifier: BSD-3-Clause
"""Stage ``dark``: master dark, temporal-noise map and bad-pixel mask per channel and DIT."""

from __future__ import annotations

from dataclasses import dataclass, fields

from pipeline.errors import BadInput
from pipeline.inventory import Inventory, dark_label, ft_dark_label
from pipeline.numerics.darks import master_dark
from pipeline.stage import Array, Stage, Unit
from pipeline.store import computed_here


@dataclass(frozen=True)
class DarkParams:
    kappa: float = 5.0                # clipping threshold, robust sigmas
    hot_rate_adu_s: float = 20.0      # science hot pixel: dark rate above typical, ADU/s
    ft_hot_rate_adu_s: float = 5000.0 # fringe-tracker hot pixel, ADU/s (1 ms frames)
    hot_sigma: float = 5.0            # ... and excess above hot_sigma x spatial scatter
    dead_low_adu: float = 100.0       # dead: master below typical level by this, ADU
    noisy_factor: float = 5.0         # noisy: temporal noise above this x median noise
    quiet_factor: float = 0.2         # dead: temporal noise below this x median noise
    false_alarm: float = 1e-6         # per-pixel chance of flagging an ordinary pixel
    frames_per_chunk: int = 32        # science frames read at a time (bounded memory)
    ft_frames_per_chunk: int = 4096   # fringe-tracker frames read at a time

    def __post_init__(self):
        for f in fields(self):
            if not getattr(self, f.name) > 0 or f.name == "false_alarm" and self.false_alarm >= 0.5:
                raise ValueError(f"dark parameter {f.name} must be positive, "
                                 f"found {getattr(self, f.name)!r}")


def plan(inventory: Inventory, params: DarkParams, upstream) -> list[Unit]:
    units = [Unit(label=dark_label(s, p, dit), raw=tuple(r.path for r in recs),
                  meta={"channel": "sci", "setup": s, "polmode": p, "dit": dit})
             for (s, p, dit), recs in inventory.dark_groups().items()]
    units += [Unit(label=ft_dark_label(period), raw=tuple(r.path for r in recs),
                   meta={"channel": "ft", "period": period})
              for period, recs in inventory.ft_dark_groups().items()]
    return units


def run(inputs, params: DarkParams) -> dict:
    meta = inputs.unit.meta
    skipped = []
    if meta["channel"] == "sci":
        blocks = [b for raw in inputs.raw
                  for b in raw.science_pixels(params.frames_per_chunk).blocks]
        axes, dit, hot = ("y", "x"), meta["dit"], params.hot_rate_adu_s
    else:   # every dark reads the FT: a file with bad FT data is skipped (and recorded)
        blocks, skipped = [], []
        for raw in inputs.raw:
            try:
                blocks += list(raw.ft_counts(params.ft_frames_per_chunk).blocks)
            except BadInput as exc:
                skipped.append(str(exc))
        if not blocks:
            raise BadInput(inputs.unit.raw[0], "no dark file has usable fringe-tracker data: "
                           + "; ".join(skipped))
        axes, dit, hot = ("output", "ft_wave"), meta["period"], params.ft_hot_rate_adu_s
    res = master_dark(lambda: (computed_here(b) for b in blocks), dit=dit,
                      kappa=params.kappa, hot_rate=hot, hot_sigma=params.hot_sigma,
                      low_level=params.dead_low_adu, noisy_factor=params.noisy_factor,
                      quiet_factor=params.quiet_factor, false_alarm=params.false_alarm)
    return {"master": Array(res.master, axes, "adu", "clipped mean dark, bias included"),
            "read_noise": Array(res.read_noise, axes, "adu", "temporal noise of one frame"),
            "dark_rate": Array(res.dark_rate, axes, "adu/s", "dark rate above typical level"),
            "valid": Array(res.valid, axes, "", "True = usable pixel"),
            "hot": Array(res.hot, axes), "dead": Array(res.dead, axes),
            "noisy": Array(res.noisy, axes), "dit": float(dit), "n_frame": res.n_frame,
            "n_clipped": res.n_clipped, "n_hot": int(res.hot.sum()),
            "n_dead": int(res.dead.sum()), "n_noisy": int(res.noisy.sum()),
            "skipped_files": skipped}


STAGE = Stage(name="dark", version="1", params=DarkParams, after=("inventory",),
              granularity="setup", plan=plan, run=run, apart=True,
              doc="master dark, read-noise map, hot/dead pixel mask per channel and DIT")
