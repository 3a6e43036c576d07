# SPDX-License-Identifier: BSD-3-Clause
"""Stage ``reference``: per science or calibrator exposure, fringe-tracker phases, frame
selection, science phases referenced to the fringe tracker and the metrology, contrast loss."""

from __future__ import annotations

from dataclasses import dataclass

from pipeline.inventory import Inventory
from pipeline.reference_frames import reference_exposure
from pipeline.stage import Stage, Unit


@dataclass(frozen=True)
class ReferenceParams:
    snr_min: float = 3.0                # FT lock-loss threshold on the per-frame SNR
    max_group_delay_um: float = 5.0     # lock loss: group delay this far from its median, um
    window_frames: int = 25             # running median finding the fringe tracked, FT frames
    guard_frames: int = 10              # FT frames flagged either side of an event
    max_rejected_fraction: float = 0.05 # science frame invalid above this flagged FT fraction
    min_contrast: float = 0.2           # science frame invalid below this mean contrast loss
    weight_by_ft_flux: bool = True      # contrast loss includes coupling fluctuations (FT flux)
    ft_chunk_frames: int = 8192         # FT frames read at a time

    def __post_init__(self):
        if not self.snr_min >= 0:
            raise ValueError(f"snr_min must be >= 0, found {self.snr_min}")
        if not 0.5 <= self.max_group_delay_um <= 50:
            raise ValueError(f"max_group_delay_um must be in 0.5..50 um (the FT group delay is "
                             f"unambiguous within ~25 um), found {self.max_group_delay_um}")
        if not (1 <= self.window_frames <= 10000 and 0 <= self.guard_frames <= 10000):
            raise ValueError("window_frames must be in 1..10000 and guard_frames in 0..10000")
        if not 0 <= self.max_rejected_fraction <= 1 or not 0 <= self.min_contrast < 1:
            raise ValueError("max_rejected_fraction must be in [0, 1] and min_contrast in [0, 1)")
        if self.ft_chunk_frames < 64:
            raise ValueError(f"ft_chunk_frames must be >= 64, found {self.ft_chunk_frames}")


def plan(inventory: Inventory, params: ReferenceParams, upstream) -> list[Unit]:
    return [Unit(label=rec.name, needs={"extract": ("extract", rec.name)},
                 meta={"kind": rec.kind, "setup": rec.setup, "polmode": rec.polmode})
            for rec in inventory.select(("science", "calibrator"))]


def run(inputs, params: ReferenceParams) -> dict:
    return reference_exposure(
        inputs.products["extract"], instrument=inputs.instrument, snr_min=params.snr_min,
        max_group_delay=params.max_group_delay_um * 1e-6, window=params.window_frames,
        guard=params.guard_frames, max_rejected_fraction=params.max_rejected_fraction,
        min_contrast=params.min_contrast, weight_by_ft_flux=params.weight_by_ft_flux,
        chunk=params.ft_chunk_frames)


STAGE = Stage(name="reference", version="3", params=ReferenceParams, after=("extract",),
              granularity="exposure", plan=plan, run=run, apart=True,
              doc="per exposure: FT phase, group delay and SNR; lock-loss and fringe-jump "
                  "selection; phase referencing with metrology; contrast loss")
