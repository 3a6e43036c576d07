# SPDX-License-Identifier: BSD-3-Clause
"""The stages of a reduction, in graph order (each a ``pipeline.stage.Stage``)."""

from recipes import (average, binary, calibrate, combiner, dark, extract, flat, inventory, merge,
                     reference, report, tables, wavecal)

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
    tables.STAGE,
    report.STAGE,
]
