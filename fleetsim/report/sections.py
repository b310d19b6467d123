"""The report's sections: each a question a team asks, answered from the run folder.

Every number comes from the run folder (summary.json, config.json and tables/*.csv); the
metrics compute every figure (docs/metrics.md) and the sections only read and format them.
Each figure is drawn from the same numbers its data table shows.
"""

from __future__ import annotations

from .bias import bias_section, participation_section
from .model import Section
from .overview import caution_section, headline_section, run_section
from .rounds import durations_section, over_time_section
from .rundir import RunFolder
from .secure import secure_section
from .tasks import cost_section, load_section, survival_section
from .waste import waste_section

__all__ = ["build_sections"]


def build_sections(r: RunFolder) -> list[Section]:
    """Every section of the report, in reading order (secure aggregation's after the round durations)."""
    secure = secure_section(r)  # only when secure aggregation was on
    return [run_section(r), headline_section(r), over_time_section(r), durations_section(r),
            *([secure] if secure is not None else []), waste_section(r), bias_section(r), participation_section(r),
            survival_section(r), cost_section(r), load_section(r), caution_section(r)]
