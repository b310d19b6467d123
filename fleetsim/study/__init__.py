"""Studies: sweeps over a grid of cells, paired comparisons, stress tests and recommendations.

A study only calls the public :func:`fleetsim.simulate` (in worker processes or on a Dask
cluster) and reads the summaries it returns. See docs/studies.md.

From Python::

    from fleetsim.study import FleetFile, parse_axis, run_sweep, write_sweep
    base = FleetFile.read("fleets/inkwren.yaml", ["fleet.devices=20000", "horizon.duration=3d"])
    axes = [parse_axis("rounds.over_selection=1.1,1.3,1.5"), parse_axis("rounds.report_deadline=4m:8m:2m")]
    result = run_sweep(base, axes, seeds=range(5), folder="out/sweep")
    write_sweep(result, "out/sweep")
    result.recommendation.label
"""

from .compare import Arm, ComparisonResult, Detection, parse_detect, run_compare
from .compare_output import HEADLINE, comparison_record, render_compare, write_compare
from .executors import DaskCluster, InProcess, Job, LocalProcesses, make_executor, run_one
from .names import renamed, resolve_metric
from .pareto import dominates, pareto_front
from .recommend import Limit, Objective, Recommendation, parse_limit, recommend
from .settings import Axis, Cell, FleetFile, grid_cells, parse_axis, read_stress
from .stats import Interval, mean_interval, paired_interval, paired_power, seeds_needed
from .store import RunStore, engine_fingerprint, run_key, source_fingerprint
from .sweep import DEFAULT_OBJECTIVE, SweepResult, run_sweep
from .sweep_output import render_sweep, study_record, write_sweep
from .table import (
    PARETO_OBJECTIVES,
    WORST_REPRESENTATION,
    WORST_REPRESENTATION_TYPE,
    column_name,
    direction_of,
    flatten_summary,
)
from .verdicts import CONDITIONS, VERDICTS, Condition

__all__ = [
    "Arm",
    "Axis",
    "CONDITIONS",
    "Cell",
    "ComparisonResult",
    "Condition",
    "DEFAULT_OBJECTIVE",
    "DaskCluster",
    "Detection",
    "FleetFile",
    "HEADLINE",
    "InProcess",
    "Interval",
    "Job",
    "Limit",
    "LocalProcesses",
    "Objective",
    "PARETO_OBJECTIVES",
    "Recommendation",
    "RunStore",
    "SweepResult",
    "VERDICTS",
    "WORST_REPRESENTATION",
    "WORST_REPRESENTATION_TYPE",
    "column_name",
    "comparison_record",
    "direction_of",
    "dominates",
    "engine_fingerprint",
    "flatten_summary",
    "grid_cells",
    "make_executor",
    "mean_interval",
    "paired_interval",
    "paired_power",
    "pareto_front",
    "parse_axis",
    "parse_detect",
    "parse_limit",
    "read_stress",
    "recommend",
    "renamed",
    "render_compare",
    "render_sweep",
    "resolve_metric",
    "run_compare",
    "run_key",
    "run_one",
    "run_sweep",
    "seeds_needed",
    "source_fingerprint",
    "study_record",
    "write_compare",
    "write_sweep",
]
