# SPDX-License-Identifier: BSD-3-Clause
"""Stage ``figure``: the QC figure of each science exposure's binary fit (data, model,
residuals, chi-square map), drawn as soon as that fit is done, into the report's figure
cache ``WORK/report/figure-cache`` (``pipeline.report.exposure_figure``).

The report then publishes the drawn figures instead of drawing them all itself at the
end of the night, alone on one core. A figure whose content is unchanged (a rerun after
a flag threshold moved) is not drawn again. Should the cache entry be gone, the report
draws it."""

from __future__ import annotations

from dataclasses import dataclass

from pipeline.inventory import Inventory
from pipeline.report import exposure_figure
from pipeline.stage import Stage, Unit


@dataclass(frozen=True)
class FigureParams:
    pass                 # the figure's look is the report's; nothing to set here


def plan(inventory: Inventory, params: FigureParams, upstream) -> list[Unit]:
    return [Unit(label=u.label, raw=u.raw, needs={"fit": ("binary", u.label)})
            for u in upstream.get("binary", [])]


def run(inputs, params: FigureParams) -> dict:
    entry = exposure_figure(inputs.workdir / "report", inputs.products["fit"])
    return {"cache_entry": entry}


STAGE = Stage(name="figure", version="1", params=FigureParams, after=("binary",),
              granularity="exposure", plan=plan, run=run, apart=True,
              doc="QC figure of each exposure's binary fit, drawn when the fit is done")
