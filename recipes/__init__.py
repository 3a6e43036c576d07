# SPDX-License-Identifier: BSD-3-Clause
"""The stages of a reduction, in graph order (each a ``pipeline.stage.Stage``)."""

from recipes import dark, inventory

STAGES = [
    inventory.STAGE,
    dark.STAGE,
]
