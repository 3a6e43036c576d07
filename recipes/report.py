# SPDX-License-Identifier: BSD-3-Clause
"""Stage ``report``: the night's QC report ``WORK/report/index.html`` with PNG figures
(uv coverage, V2 and closure phases with the model, residuals, chi-square maps,
astrometry against time, calibration QC of the earlier stages)."""

from __future__ import annotations

from dataclasses import dataclass

from pipeline import __version__
from pipeline.astrometry_table import astrometry_table, config_hash, row_from_binary
from pipeline.binary_product import FLAG_DOC
from pipeline.errors import NothingToDo
from pipeline.inventory import Inventory
from pipeline.report import build_report
from pipeline.stage import Stage, Unit

QC_STAGES = ("flat", "wavecal", "combiner", "reference")


@dataclass(frozen=True)
class ReportParams:
    title: str = "twinfield night report"   # page title
    qc: bool = True                         # include calibration QC of earlier stages


def plan(inventory: Inventory, params: ReportParams, upstream) -> list[Unit]:
    fitted = [u.label for u in upstream.get("binary", [])]
    needs = {f"binary:{k}": ("binary", lab) for k, lab in enumerate(fitted)}
    # the exposure figures drawn beside the fits (the report draws any that are missing)
    needs.update({f"figure:{k}": ("figure", u.label)
                  for k, u in enumerate(upstream.get("figure", [])) if u.label in fitted})
    if params.qc:     # reference products of the fitted exposures only: a bad calibrator
        for stage in QC_STAGES:     # file must not take the night's report down with it
            needs.update({f"{stage}:{k}": (stage, u.label)
                          for k, u in enumerate(upstream.get(stage, []))
                          if stage != "reference" or u.label in fitted})
    return [Unit(label="night", needs=needs)]


def run(inputs, params: ReportParams) -> dict:
    prods = inputs.products
    fitted = sorted(((v.attrs, v) for r, v in prods.items() if r.startswith("binary:")),
                    key=lambda av: av[0].get("mjd", 0.0))     # attributes read once
    if not fitted:
        raise NothingToDo("no science exposure was fitted")
    attrs, binaries = [a for a, _ in fitted], [v for _, v in fitted]
    qc = {s: [v for r, v in prods.items() if r.startswith(s + ":")] for s in QC_STAGES}
    table = astrometry_table([row_from_binary(a) for a in attrs], code_version=__version__,
                             config=config_hash(a.get("key", "") for a in attrs),
                             flag_doc=FLAG_DOC)
    # a figure unit that failed on its own is drawn here; a failed fit is said once
    failed = sorted(m for r, m in inputs.failed.items() if not r.startswith("figure:"))
    path = build_report(inputs.workdir / "report", binaries, table=table, qc=qc,
                        title=params.title, failed=failed, binary_attrs=attrs)
    return {"index_html": str(path), "n_exposures": len(binaries),
            "failed_inputs": "\n".join(sorted(inputs.failed.values()))}


STAGE = Stage(name="report", version="4", params=ReportParams, after=("binary", "figure"),
              granularity="night", plan=plan, run=run, apart=True, partial=True,
              doc="QC report: uv coverage, V2/closure phases with model, chi2 maps, astrometry")
