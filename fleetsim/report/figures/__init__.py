"""The report's figures, drawn with matplotlib and returned as inline SVG text.

Each function draws exactly the numbers it is given; the section modules read those numbers
from the run folder's tables and show the same ones in the figure's data table.
"""

from __future__ import annotations

from .groups import BIAS_SERIES, bias, cost, never_reported, participation, waste_by_cause, waste_by_type
from .impact import accuracy_over_rounds, epsilon_ranges
from .sharing import competition
from .survival import survival
from .time import durations, load, rounds_over_time, share_rows

__all__ = [
    "share_rows", "rounds_over_time", "durations", "waste_by_cause", "waste_by_type", "bias", "BIAS_SERIES",
    "participation", "never_reported", "survival", "cost", "load", "competition",
    "epsilon_ranges", "accuracy_over_rounds",
]
