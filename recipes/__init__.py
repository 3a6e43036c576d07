# SPDX-License-Identifier: BSD-3-Clause
"""The stages of a reduction, in graph order (each a ``pipeline.stage.Stage``)."""

from recipes import (average, binary, calibrate, combiner, dark, extract, figure, flat, inventory,
                     merge, reference, report, tables, wavecal)

STAGES = [
    inventory.STAGE,
    dark.STAGE,
    flat.STAGE,
    wavecal.STAGE,
    combiner.STAGE,
    extract.STAGE,
    reference.STAGE,
    average.STAGE,
    calibrate.STAGE,
    merge.STAGE,
    binary.STAGE,
    figure.STAGE,
    tables.STAGE,
    report.STAGE,
]

# Stages that only draw pictures of the products (left out where only numbers matter).
DRAWING = ("figure", "report")
