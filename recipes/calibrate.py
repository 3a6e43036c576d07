# SPDX-License-Identifier: BSD-3-Clause
"""Stage ``calibrate``: per science exposure, transfer function and phase zero-points from
the night's calibrator stars of the same set-up and polarisation mode (transfer function
interpolated between those bracketing it in time), calibrated observables, and the
exposure's OIFITS v2 file ``WORK/oifits/<exposure>.fits``."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

from pipeline.inventory import Inventory
from pipeline.observables import OutputsView, array_for, calibrate_product, oifits_observations
from pipeline.oifits import write_oifits
from pipeline.stage import Stage, Unit


@dataclass(frozen=True)
class CalibrateParams:
    interpolation: Literal["linear", "nearest"] = "linear"  # transfer function in time
    scatter_floor: float = 0.0    # fraction of |T_after - T_before| added to the T error
    write_oifits: bool = True     # write WORK/oifits/<exposure>.fits
    # referenced-phase zero-point: "fit" (constant over the night, jointly with each calibrator
    # star's pointing offset; needs every calibrator of the set-up) or "interpolate"
    phase_zero_point: Literal["fit", "interpolate"] = "fit"

    def __post_init__(self):
        if self.interpolation not in ("linear", "nearest"):
            raise ValueError(f"interpolation must be 'linear' or 'nearest', "
                             f"found {self.interpolation!r}")
        if self.phase_zero_point not in ("fit", "interpolate"):
            raise ValueError(f"phase_zero_point must be 'fit' or 'interpolate', "
                             f"found {self.phase_zero_point!r}")
        if not 0.0 <= self.scatter_floor <= 1.0:
            raise ValueError(f"scatter_floor must be in [0, 1], found {self.scatter_floor}")


def _bracketing(rec, cals, method):
    """The calibrators the interpolation uses: the last before and the first after
    ``rec`` (or the nearest one, for "nearest" or outside the calibrators' span)."""
    before = [c for c in cals if c.mjd <= rec.mjd]
    after = [c for c in cals if c.mjd > rec.mjd]
    if method == "linear" and before and after:
        return [before[-1], after[0]]
    return sorted(cals, key=lambda c: abs(c.mjd - rec.mjd))[:1]


def plan(inventory: Inventory, params: CalibrateParams, upstream) -> list[Unit]:
    units = []
    for rec in inventory.select("science"):
        cals = inventory.select("calibrator", rec.setup, rec.polmode)
        if params.phase_zero_point == "interpolate":
            cals = _bracketing(rec, cals, params.interpolation)
        needs = {"science": ("average", rec.name)}
        needs.update({f"cal{k}": ("average", c.name) for k, c in enumerate(cals)})
        units.append(Unit(label=rec.name, raw=(rec.path,), needs=needs,
                          meta={"setup": rec.setup, "polmode": rec.polmode,
                                "calibrators": [c.name for c in cals]}))
    return units


def run(inputs, params: CalibrateParams) -> dict:
    prods = inputs.products
    cals = [prods[f"cal{k}"] for k in range(len(inputs.unit.meta["calibrators"]))]
    out = calibrate_product(prods["science"], cals, science_path=inputs.unit.raw[0],
                            method=params.interpolation, scatter_floor=params.scatter_floor,
                            phase_zero_point=params.phase_zero_point)
    if params.write_oifits and inputs.workdir is not None:
        view = OutputsView(out)
        path = write_oifits(inputs.workdir / "oifits" / f"{inputs.unit.label}.fits",
                            oifits_observations(view), array_for(view, inputs.instrument))
        out["oifits_path"] = str(path)
    return out


STAGE = Stage(name="calibrate", version="3", params=CalibrateParams, after=("average",),
              granularity="exposure", plan=plan, run=run, apart=True,
              doc="transfer function and phase zero-points from calibrators; calibrated "
                  "observables and OIFITS v2 per science exposure")
