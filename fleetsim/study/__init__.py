"""Studies: sweeps over settings, paired comparisons, stress tests and recommendations.

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

from .compare import Arm, ComparisonResult, Detection, parse_detect, render_compare, run_compare, write_compare
from .executors import DaskCluster, InProcess, Job, LocalProcesses, make_executor, run_one
from .pareto import dominates, pareto_front
from .recommend import Limit, Objective, Recommendation, parse_limit, recommend
from .settings import Axis, Cell, FleetFile, grid_cells, parse_axis, read_stress
from .stats import Interval, mean_interval, paired_interval, paired_power, seeds_needed
from .store import RunStore, run_key
from .sweep import SweepResult, render_sweep, run_sweep, write_sweep
from .table import PARETO_OBJECTIVES, WORST_REPRESENTATION, direction_of, flatten_summary

__all__ = [
    "Arm",
    "Axis",
    "Cell",
    "ComparisonResult",
    "DaskCluster",
    "Detection",
    "FleetFile",
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
    "WORST_REPRESENTATION",
    "direction_of",
    "dominates",
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
    "render_compare",
    "render_sweep",
    "run_compare",
    "run_key",
    "run_one",
    "run_sweep",
    "seeds_needed",
    "write_compare",
    "write_sweep",
]
