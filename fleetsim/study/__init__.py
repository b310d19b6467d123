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
from .compare_output import (
    HEADLINE,
    HEADLINE_SEVERAL,
    comparison_record,
    headline_metrics,
    render_compare,
    write_compare,
)
from .executors import DaskCluster, InProcess, Job, LocalProcesses, make_executor, run_one
from .names import renamed, resolve_metric
from .pareto import dominates, pareto_front
from .recommend import Limit, Objective, Recommendation, parse_limit, recommend
from .settings import Axis, Cell, FleetFile, check_policies, grid_cells, parse_axis, read_stress, workload_names
from .stats import Interval, mean_interval, paired_interval, paired_power, seeds_needed
from .store import RunStore, engine_fingerprint, run_key, source_fingerprint
from .sweep import DEFAULT_OBJECTIVE, DEFAULT_OBJECTIVE_SEVERAL, SweepResult, default_objective, run_sweep
from .sweep_output import render_sweep, study_record, write_sweep
from .table import (
    PARETO_OBJECTIVES,
    PARETO_OBJECTIVES_SEVERAL,
    SEVERAL_COMMITTED,
    SEVERAL_TOTALS,
    SEVERAL_WASTE,
    SEVERAL_WASTE_WORKLOAD,
    WORST_REPRESENTATION,
    WORST_REPRESENTATION_TYPE,
    WORST_REPRESENTATION_WORKLOAD,
    column_name,
    direction_of,
    flatten_summary,
    is_several,
    split_workload,
    workload_prefix,
    workload_prefixes,
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
    "DEFAULT_OBJECTIVE_SEVERAL",
    "DaskCluster",
    "Detection",
    "FleetFile",
    "HEADLINE",
    "HEADLINE_SEVERAL",
    "InProcess",
    "Interval",
    "Job",
    "Limit",
    "LocalProcesses",
    "Objective",
    "PARETO_OBJECTIVES",
    "PARETO_OBJECTIVES_SEVERAL",
    "Recommendation",
    "RunStore",
    "SEVERAL_COMMITTED",
    "SEVERAL_TOTALS",
    "SEVERAL_WASTE",
    "SEVERAL_WASTE_WORKLOAD",
    "SweepResult",
    "VERDICTS",
    "WORST_REPRESENTATION",
    "WORST_REPRESENTATION_TYPE",
    "WORST_REPRESENTATION_WORKLOAD",
    "check_policies",
    "column_name",
    "comparison_record",
    "default_objective",
    "direction_of",
    "dominates",
    "engine_fingerprint",
    "flatten_summary",
    "grid_cells",
    "headline_metrics",
    "is_several",
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
    "split_workload",
    "study_record",
    "workload_names",
    "workload_prefix",
    "workload_prefixes",
    "write_compare",
    "write_sweep",
]
