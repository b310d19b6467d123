"""A comparison: a baseline and a candidate setting run under the same seeds, paired by seed.

For every summary metric (and every device type's shares) it reports the mean per-seed
difference candidate - baseline with a 95% paired t interval and a verdict code
(:mod:`fleetsim.study.verdicts`). ``--detect METRIC=CHANGE`` asks how many seeds a paired t
test needs for a change of your choosing.

With a stress file, each arm runs as configured and again with the stress file's
disruptions added, and each condition (code ``as-configured`` or ``stressed``) is compared
on its own: does the candidate still beat the baseline when the disruption happens?

With several workloads both arms must train the same ones (in any order); every workload's
figures are compared under its ``workloads_<name>_`` prefix, each in its own direction, beside
the totals over the workloads (:data:`fleetsim.study.table.SEVERAL_TOTALS`) and the
``sharing`` figures. Two sharing rules are compared by setting ``sharing.rule`` (and under
``shares`` every ``workloads.<name>.share``) in each arm.

:func:`run_compare` runs it; :mod:`fleetsim.study.compare_output` prints and writes it.
"""

from __future__ import annotations

import math
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from ..errors import ConfigError
from ..policies import make_policy
from .executors import Executor, InProcess, Job
from .names import resolve_metric
from .runs import Progress, gather
from .settings import FleetFile, parse_assignment, workload_names
from .store import RunStore, run_key
from .table import flatten_summary, frame_of_rows, metric_columns
from .verdicts import Condition, detections, differences

__all__ = ["Arm", "Detection", "ComparisonResult", "run_compare", "parse_detect"]

@dataclass(frozen=True)
class Arm:
    """One side of a comparison: a name (``baseline`` or ``candidate``) and its ``key.path=value`` settings."""

    name: str
    overrides: tuple[str, ...]

    @property
    def label(self) -> str:
        return ", ".join(self.overrides) or "(the file as it is)"


@dataclass(frozen=True)
class Detection:
    """A change to detect in ``metric``: absolute, or relative to the baseline mean."""

    metric: str
    change: float
    relative: bool

    def __str__(self) -> str:
        return f"{self.metric}={100 * self.change:g}%" if self.relative else f"{self.metric}={self.change:g}"


def parse_detect(text: str) -> Detection:
    """Read ``METRIC=CHANGE`` (``CHANGE`` a number, or a percentage of the baseline mean).

    Raises ConfigError naming ``--detect``.
    """
    metric, raw = parse_assignment(text, "--detect")
    try:
        relative = raw.endswith("%")
        change = float(raw[:-1]) / 100.0 if relative else float(raw)
    except ValueError:
        raise ConfigError([f"--detect {text}: {raw!r} is not a number or a percentage"]) from None
    if not math.isfinite(change) or change == 0:
        raise ConfigError([f"--detect {text}: the change must be a non-zero finite number"])
    return Detection(metric=metric, change=abs(change), relative=relative)


@dataclass
class ComparisonResult:
    """Everything a comparison found. ``runs``: one row per condition, arm and seed;
    ``differences``: one row per condition and metric; ``detections``: one row per
    condition and ``--detect``."""

    base: FleetFile
    baseline: Arm
    candidate: Arm
    seeds: list[int]
    candidate_seed_offset: int
    conditions: list[Condition]
    runs: pd.DataFrame
    differences: pd.DataFrame
    detections: pd.DataFrame
    power: float
    caution: str
    executor: str
    reused: int
    wall_s: float
    type_names: list[str] = field(default_factory=list)
    workloads: list[str] = field(default_factory=list)
    """The names of the workloads both arms train when there are several (empty for one)."""


def _arm_config(base: FleetFile, arm: Arm, option: str) -> Any:
    try:
        config = base.config(arm.overrides)
        jobs = config.jobs
        for job in jobs:
            where = {} if len(jobs) == 1 else {"source": f"{base.source}: workloads.{job.name}.selection"}
            make_policy(job.config.selection.policy, job.config.selection.params, **where)
    except ConfigError as exc:
        raise ConfigError([f"{option} {arm.label}: {line}" for line in exc.problems]) from None
    return config


def _check(detect: Sequence[Detection]) -> Any:
    """A check of the first summary: every ``--detect`` metric names a column."""
    def check(summary: dict[str, Any]) -> None:
        columns = list(flatten_summary(summary))
        problems = []
        for wanted in detect:
            try:
                resolve_metric(wanted.metric, columns, "--detect")
            except ConfigError as exc:
                problems.extend(exc.problems)
        if problems:
            raise ConfigError(problems)
    return check


def run_compare(
    base: FleetFile,
    baseline: Arm,
    candidate: Arm,
    seeds: Sequence[int],
    stress: str | Path | None = None,
    detect: Sequence[Detection] = (),
    power: float = 0.8,
    executor: Executor | None = None,
    folder: str | Path | None = None,
    progress: Progress | None = None,
    candidate_seed_offset: int = 0,
) -> ComparisonResult:
    """Run both arms under ``seeds`` (and under ``stress`` if given) and compare them.

    ``candidate_seed_offset`` runs the candidate under seed + offset instead of the same seed;
    0 (the default) pairs runs on common random numbers, anything else breaks the pairing on
    purpose (for checking the method). Raises ConfigError for a bad setting, stress file,
    ``--detect`` metric or power; FleetsimError when a run fails.
    """
    if not seeds:
        raise ConfigError(["--seeds: expected at least 1"])
    if not 0.0 < power < 1.0:
        raise ConfigError([f"--power {power}: expected a number between 0 and 1, e.g. 0.8"])
    for arm, option in ((baseline, "--baseline"), (candidate, "--candidate")):
        for item in arm.overrides:
            parse_assignment(item, option)
    started = time.perf_counter()
    conditions: list[tuple[Condition, FleetFile]] = [(Condition("as-configured"), base)]
    if stress is not None:
        conditions.append((Condition("stressed", str(stress)), base.with_stress(stress)))
    jobs: list[Job] = []
    plan: list[tuple[Condition, Arm, int, int, str]] = []  # condition, arm, seed, run seed, key
    names: dict[str, list[str]] = {}
    for condition, fleet_file in conditions:
        for arm, option, offset in ((baseline, "--baseline", 0), (candidate, "--candidate", candidate_seed_offset)):
            config = _arm_config(fleet_file, arm, option)
            names[arm.name] = workload_names(config)
            for seed in seeds:
                key = run_key(config, seed + offset)
                jobs.append(Job(key=key, config=config, seed=seed + offset, label=f"{arm.name} ({condition.text})"))
                plan.append((condition, arm, seed, seed + offset, key))
    _same_workloads(baseline, candidate, names)
    store = RunStore(Path(folder) / "cells") if folder is not None else None
    runner = executor or InProcess()
    summaries, reused = gather(jobs, runner, store, progress, _check(detect))

    rows = []
    for condition, arm, seed, run_seed, key in plan:
        flat = flatten_summary(summaries[key])
        flat.pop("seed", None)
        rows.append({"condition": condition.code, "stress_file": condition.stress_file, "arm": arm.name,
                     "arm_settings": ", ".join(arm.overrides), "seed": seed, "run_seed": run_seed, **flat})
    runs = frame_of_rows(rows)
    metrics = metric_columns(runs, exclude=["run_seed"])
    kept = [c for c, _ in conditions]
    first = summaries[plan[0][4]]
    workloads = names[baseline.name]
    types = next(iter(first["workloads"].values()), {}) if workloads else first
    return ComparisonResult(
        base=base, baseline=baseline, candidate=candidate, seeds=list(seeds),
        candidate_seed_offset=candidate_seed_offset, conditions=kept, runs=runs,
        differences=differences(runs, kept, metrics, baseline.name, candidate.name, power),
        detections=detections(runs, kept, metrics, baseline.name, candidate.name, detect, power),
        power=power, caution=first.get("caution", ""), executor=runner.description, reused=reused,
        wall_s=time.perf_counter() - started, type_names=list(types.get("bias", {}).get("by_device_type", {})),
        workloads=workloads,
    )


def _same_workloads(baseline: Arm, candidate: Arm, names: dict[str, list[str]]) -> None:
    """Refuse arms that train different workloads: each workload's figures are paired by name.

    Raises ConfigError naming ``--candidate`` and both arms' workloads.
    """
    ours, theirs = names[baseline.name], names[candidate.name]
    if sorted(ours) != sorted(theirs):
        def shown(found: list[str]) -> str:
            return ", ".join(found) if found else "one workload"
        raise ConfigError([f"--candidate {candidate.label}: the arms train different workloads (baseline: "
                           f"{shown(ours)}; candidate: {shown(theirs)}); a comparison pairs each workload's "
                           "figures, so both arms need the same workloads"])
