"""Fitting the fleet model to telemetry: pure functions, DataFrames in, numbers and a fleet
file's mapping out (no file I/O; ``fleetsim fit`` in :mod:`fleetsim.cli.fit` reads and writes).

Modules: ``stats`` (sufficient statistics of interval logs, pandas or Dask), ``rates``
(maximum-likelihood rates, exact intervals, pooling), ``snapshots`` (the likelihood of
check-in snapshots), ``gapclasses`` (their gaps grouped into classes), ``mix`` (device mix,
battery levels, traits, the held-out split),
``fleetfile`` (the signal patterns, the settled state), ``model`` (:func:`fit_fleet`),
``yamlout`` (the commented YAML text). docs/fit.md describes the method.
"""

from .fleetfile import MIN_SETTLED, settled_probability
from .mix import MIX_TEST_LEVEL, battery_laws, device_table, fleet_mix, held_out_mask, trait_laws
from .model import COPIED_SECTIONS, FitResult, fit_fleet
from .rates import LEVEL, MIN_TRANSITIONS, estimate_rates, garwood, p_interval
from .snapshots import MAX_GAP_S, MIN_CHANGES, fit_snapshots
from .stats import CHAIN_NAMES, DAY_KINDS, dask_interval_statistics, interval_statistics, sum_statistics
from .yamlout import FIT_HEADER, render_yaml

__all__ = [
    "CHAIN_NAMES", "COPIED_SECTIONS", "DAY_KINDS", "FIT_HEADER", "FitResult", "LEVEL", "MAX_GAP_S",
    "MIN_CHANGES", "MIN_SETTLED", "MIN_TRANSITIONS", "MIX_TEST_LEVEL", "battery_laws", "dask_interval_statistics",
    "device_table", "estimate_rates", "fit_fleet", "fit_snapshots", "fleet_mix", "garwood", "held_out_mask",
    "interval_statistics", "p_interval", "render_yaml", "settled_probability", "sum_statistics", "trait_laws",
]
