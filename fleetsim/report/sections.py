"""The report's sections: each a question a team asks, answered from the run folder.

Every number comes from the run folder (summary.json, config.json and tables/*.csv); the
metrics compute every figure (docs/metrics.md) and the sections only read and format them.
Each figure is drawn from the same numbers its data table shows.
"""

from __future__ import annotations

from dataclasses import replace

from .bias import bias_section, participation_section
from .impact import impact_section
from .model import Part, Section
from .overview import caution_of, caution_section, headline_section, run_section
from .privacy import privacy_section
from .rounds import durations_section, over_time_section
from .rundir import RunFolder
from .secure import secure_section
from .several import SeveralFolder
from .sharing import sharing_section
from .style import prefix_ids
from .tasks import cost_section, load_section, survival_section
from .waste import waste_section

__all__ = ["build_sections", "build_several"]


def build_sections(r: RunFolder) -> list[Section]:
    """Every section of the report, in reading order: secure aggregation's after the round
    durations, privacy's and model impact's after who takes part (each only when there is one)."""
    secure = secure_section(r)  # only when secure aggregation was on
    extra = [s for s in (privacy_section(r), impact_section(r)) if s is not None]  # workload.privacy; impact.json
    return [run_section(r), headline_section(r), over_time_section(r), durations_section(r),
            *([secure] if secure is not None else []), waste_section(r), bias_section(r), participation_section(r),
            *extra, survival_section(r), cost_section(r), load_section(r), caution_section(r)]


def _prefixed(section: Section, prefix: str) -> Section:
    """``section`` with ``prefix-`` before its id, its tables' ids and its figures' SVG ids (unique on the page)."""
    return replace(section, id=f"{prefix}-{section.id}",
                   charts=[replace(c, svg=prefix_ids(c.svg, prefix)) for c in section.charts],
                   tables=[replace(t, id=f"{prefix}-{t.id}") for t in section.tables])


def build_several(f: SeveralFolder) -> tuple[list[Section], list[Part], list[Section]]:
    """The report of a run of several workloads: (opening sections, one part per workload, closing sections).

    The opening says how the workloads shared the fleet; each part is the whole report of one
    workload's run folder (``workloads/NAME/``) but its caution, its ids prefixed ``w1``,
    ``w2``, ... in the order of ``sharing.workloads``; the caution closes the report once.
    """
    parts = []
    for i, (name, sub) in enumerate(f.parts):
        prefix = f"w{i + 1}"
        where = sub.path.relative_to(f.path).as_posix()
        intro = (f"The report of the workload {name} alone, read from {where}/ (its summary.json, config.json "
                 "and tables/): its rounds, its participations and the device work they took. The fleet, the "
                 "horizon and the seed are the run's; a device taking part in, or resting after, another "
                 "workload's round was not free for this one.")
        sections = [_prefixed(s, prefix) for s in build_sections(sub) if s.id != "caution"]
        parts.append(Part(prefix, name, intro, sections))
    return [sharing_section(f)], parts, [caution_of(f.summary)]
