# SPDX-License-Identifier: BSD-3-Clause
"""The forward model of a night of the FOURFOLD combiner (``twinfield simulate``)."""

from .night import plan_night, simulate_night
from .scenario import load_scenario

__all__ = ["simulate_night", "plan_night", "load_scenario"]
