"""What a comparison tests, and on what scale: primary metrics, margins, rates, constants.

- **Primary metrics** (``--primary``, default :data:`DEFAULT_PRIMARY`, or with several
  workloads :data:`DEFAULT_PRIMARY_SEVERAL`, the totals over them) decide the overall line;
  each needs a direction. Every other tested metric is secondary.
- **Margins** (``--margin METRIC=2%`` or ``=0.5``): the largest change that does not matter,
  relative to the baseline mean or in the metric's unit (:class:`Margin`).
- **Counts are judged as rates** (:data:`COUNT_RATES`): a raw count or total grows with the
  horizon and with the number of rounds, so a candidate that runs more rounds has more
  dropouts even when each participation drops out less often. Each count is divided by the
  simulated hours, the rounds attempted or the participations accepted of its own run (and
  workload), and the rate is tested instead; the count itself gets ``judged-as-rate``.
- **Constants are not tested** (:func:`pinned`): a figure with one value on every seed in
  both arms (``not-tested-constant``), or one that a setting pins: an input echoed in the
  summary (:data:`SETTING_ECHOES`), a figure constant in each arm but different between them,
  or present and constant in one arm only (``set-by-arms``). Such a difference comes from the
  settings, not from chance, so a p-value would mean nothing.
"""

from __future__ import annotations

import fnmatch
import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..errors import ConfigError
from .compare_sequential import Schedule, schedule
from .settings import parse_assignment
from .table import PARETO_OBJECTIVES, PARETO_OBJECTIVES_SEVERAL, Direction, direction_of, split_workload

__all__ = ["DEFAULT_PRIMARY", "DEFAULT_PRIMARY_SEVERAL", "COUNT_RATES", "SETTING_ECHOES", "Margin", "parse_margin",
           "count_rates", "add_rates", "pinned", "judged_direction", "default_primary", "parse_design"]

DEFAULT_PRIMARY = tuple(metric for metric, _ in PARETO_OBJECTIVES)
"""Committed rounds per hour, compute waste fraction, worst representation."""

DEFAULT_PRIMARY_SEVERAL = tuple(metric for metric, _ in PARETO_OBJECTIVES_SEVERAL)
"""The totals over the workloads (``study_*``)."""

HOURS = "simulated_hours"
_DENOMINATORS = {"hour": HOURS, "round": "rounds_attempted", "participation": "participations_accepted"}

COUNT_RATES: tuple[tuple[str, str], ...] = (
    ("rounds_committed", "hour"),
    ("rounds_attempted", "hour"),
    ("rounds_ended_by_*", "round"),
    ("participations_accepted", "hour"),
    ("participations_used_reports", "participation"),
    ("participations_used_weight", "hour"),
    ("participations_by_outcome_*", "participation"),
    ("participations_dropouts_by_cause_*", "participation"),
    ("waste_by_cause_*_participations", "participation"),
    ("waste_by_cause_*_compute_s", "hour"),
    ("waste_by_cause_*_bytes", "hour"),
    ("waste_by_cause_*_energy_wh", "hour"),
    ("waste_by_cause_*_examples", "hour"),
    ("waste_compute_s", "hour"),
    ("waste_bytes", "hour"),
    ("waste_energy_wh", "hour"),
    ("waste_examples", "hour"),
    ("waste_examples_processed", "hour"),
    ("server_load_checkins", "hour"),
    ("server_load_accepted", "hour"),
    ("server_load_rounds_held", "round"),
    ("server_load_held_s", "hour"),
)
"""Counts and totals (column pattern, first match wins) and what each is divided by: ``hour``
(``simulated_hours``), ``round`` (the run's or workload's ``rounds_attempted``) or
``participation`` (its ``participations_accepted``). The rate is ``<count>_per_<unit>``
(``rounds_committed`` is judged as the summary's own ``rounds_committed_per_hour``)."""

SETTING_ECHOES = ("devices", "simulated_hours", "rounds_in_flight", "rounds_pacing", "rounds_secure_aggregation",
                  "sharing_shares_*", "sharing_workloads_*")
"""Summary figures that repeat a setting: never tested (``set-by-arms`` when the arms differ)."""


@dataclass(frozen=True)
class Margin:
    """A margin of equivalence for ``metric``: ``value`` in its unit, or a share of the
    baseline mean when ``relative``."""

    metric: str
    value: float
    relative: bool

    @property
    def text(self) -> str:
        return f"{100 * self.value:g}%" if self.relative else f"{self.value:g}"

    def absolute(self, baseline_mean: float) -> float:
        """The margin in the metric's unit (NaN when a relative margin meets a zero or unknown mean)."""
        if not self.relative:
            return self.value
        size = self.value * abs(baseline_mean)
        return size if math.isfinite(size) and size > 0 else math.nan


def number_or_percent(text: str, raw: str, option: str) -> tuple[float, bool]:
    """``raw`` as a number, or as a fraction when written ``N%`` (then ``relative``);
    ConfigError naming ``option`` and ``text`` otherwise."""
    relative = raw.endswith("%")
    try:
        return (float(raw[:-1]) / 100.0 if relative else float(raw)), relative
    except ValueError:
        raise ConfigError([f"{option} {text}: {raw!r} is not a number or a percentage"]) from None


def parse_margin(text: str) -> Margin:
    """Read ``METRIC=2%`` (relative to the baseline mean) or ``METRIC=0.5`` (absolute).

    Raises ConfigError naming ``--margin`` and the value.
    """
    metric, raw = parse_assignment(text, "--margin")
    value, relative = number_or_percent(text, raw, "--margin")
    if not (math.isfinite(value) and value > 0):
        raise ConfigError([f"--margin {text}: the margin must be a positive finite number (got {raw})"])
    return Margin(metric=metric, value=value, relative=relative)


def default_primary(workloads: Sequence[str]) -> tuple[str, ...]:
    """The primary metrics when none are named: the totals for several workloads."""
    return DEFAULT_PRIMARY_SEVERAL if workloads else DEFAULT_PRIMARY


def _unit(rest: str) -> str | None:
    for pattern, unit in COUNT_RATES:
        if fnmatch.fnmatchcase(rest, pattern):
            return unit
    return None


def count_rates(columns: Iterable[str], prefixes: Sequence[str]) -> dict[str, tuple[str, str]]:
    """Each count among ``columns``: (its rate column, the denominator column). Rate columns
    themselves are never counts."""
    columns = list(columns)
    out: dict[str, tuple[str, str]] = {}
    for column in columns:
        prefix, rest = split_workload(column, prefixes)
        unit = _unit(rest)
        if unit is None:
            continue
        denominator = HOURS if unit == "hour" else prefix + _DENOMINATORS[unit]
        if denominator not in columns:
            continue
        out[column] = (f"{column}_per_{unit}", denominator)
    rates = {rate for rate, _ in out.values()}
    return {count: pair for count, pair in out.items() if count not in rates}


def add_rates(runs: pd.DataFrame, prefixes: Sequence[str]) -> tuple[pd.DataFrame, dict[str, str]]:
    """``runs`` with a rate column for every count (a column the summary already has is kept
    as it is), and the mapping count -> rate. A zero denominator gives NaN."""
    rates = count_rates(runs.columns, prefixes)
    added: dict[str, pd.Series] = {}
    for count, (rate, denominator) in rates.items():
        if rate in runs.columns:
            continue
        values = pd.to_numeric(runs[count], errors="coerce").astype(float)
        per = pd.to_numeric(runs[denominator], errors="coerce").astype(float)
        added[rate] = values / per.where(per > 0)
    if added:
        runs = pd.concat([runs, pd.DataFrame(added, index=runs.index)], axis=1)
    return runs, {count: rate for count, (rate, _) in rates.items()}


def judged_direction(metric: str, prefixes: Sequence[str], rate_of: dict[str, str]) -> Direction | None:
    """The direction of ``metric``; a rate made here has the direction of its count."""
    for count, rate in rate_of.items():
        if rate == metric and direction_of(metric, prefixes) is None:
            return direction_of(count, prefixes)
    return direction_of(metric, prefixes)


def _flat(values: np.ndarray) -> bool:
    if values.size < 2:
        return False
    scale = max(float(np.abs(values).max()), 1e-300)
    return bool(float(np.ptp(values)) <= 1e-12 * scale)


def _same(a: np.ndarray, b: np.ndarray) -> bool:
    return bool(abs(float(a[0]) - float(b[0])) <= 1e-12 * max(abs(float(a[0])), abs(float(b[0])), 1e-300))


def pinned(metric: str, baseline: np.ndarray, candidate: np.ndarray, prefixes: Sequence[str]) -> str | None:
    """``not-tested-constant``, ``set-by-arms`` or None (to be tested), by the rule of the module
    doc, from each arm's values of ``metric`` over the seeds."""
    b = baseline[np.isfinite(baseline)]
    c = candidate[np.isfinite(candidate)]
    rest = split_workload(metric, prefixes)[1]
    if any(fnmatch.fnmatchcase(rest, p) for p in SETTING_ECHOES) and (b.size or c.size):
        same = b.size and c.size and set(np.unique(b)) == set(np.unique(c))
        return "not-tested-constant" if same else "set-by-arms"
    flat_b, flat_c = _flat(b), _flat(c)
    if flat_b and flat_c:
        return "not-tested-constant" if _same(b, c) else "set-by-arms"
    if (flat_b and c.size == 0) or (flat_c and b.size == 0):
        return "set-by-arms"
    return None


MAX_BUDGET = 10_000
MAX_LOOKS = 50
"""Limits of a sequential comparison: seeds in the budget, and looks (the boundaries are
computed for every look)."""


def parse_design(seeds: int | None, sequential: bool, budget: int | None, batch: int | None,
                 first_seed: int = 0) -> tuple[range, Schedule | None]:
    """The seeds and the sequential schedule (None: a fixed design) that ``--seeds``,
    ``--sequential``, ``--seed-budget`` and ``--batch`` ask for (``--seeds`` defaults to 5,
    ``--batch`` to 5). Raises ConfigError naming the option."""
    if not sequential:
        if budget is not None or batch is not None:
            raise ConfigError([f"{'--seed-budget' if budget is not None else '--batch'}: only with --sequential"])
        count = 5 if seeds is None else seeds
        if count < 1:
            raise ConfigError([f"--seeds {count}: expected at least 1"])
        return range(first_seed, first_seed + count), None
    if seeds is not None:
        raise ConfigError([f"--seeds {seeds}: not with --sequential, which runs --batch seeds at a time up to "
                           "--seed-budget"])
    if budget is None:
        raise ConfigError(["--sequential: give --seed-budget N, the most seeds to run"])
    batch = 5 if batch is None else batch
    if batch < 2:
        raise ConfigError([f"--batch {batch}: expected at least 2 (a paired t test needs 2 seeds)"])
    if budget < batch:
        raise ConfigError([f"--seed-budget {budget}: expected at least --batch ({batch})"])
    if budget > MAX_BUDGET:
        raise ConfigError([f"--seed-budget {budget}: at most {MAX_BUDGET}"])
    if math.ceil(budget / batch) > MAX_LOOKS:
        raise ConfigError([f"--batch {batch}: with --seed-budget {budget} that is {math.ceil(budget / batch)} looks; "
                           f"at most {MAX_LOOKS} (raise --batch)"])
    return range(first_seed, first_seed + budget), schedule(budget, batch)
