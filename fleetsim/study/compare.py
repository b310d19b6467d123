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

The primary metrics (``primary``, default :func:`fleetsim.study.compare_rules.default_primary`)
are judged under Holm's method and decide the overall line
(:mod:`fleetsim.study.compare_overall`); every other metric is secondary, under
Benjamini-Hochberg. ``margins`` add equivalence tests (TOST). Counts are judged as rates and
constants are not tested (:mod:`fleetsim.study.compare_rules`). With ``sequential`` (a
:class:`fleetsim.study.compare_sequential.Schedule`) the seeds are run in batches until every
primary metric is decided or the budget is spent (group-sequential design,
:mod:`fleetsim.study.compare_sequential`).

:func:`run_compare` runs it; :mod:`fleetsim.study.compare_output` prints and writes it.
"""

from __future__ import annotations

import math
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from functools import partial
from pathlib import Path
from typing import Any

import pandas as pd

from ..errors import ConfigError
from ..policies import make_policy
from .compare_overall import Overall, overall
from .compare_rules import Margin, add_rates, count_rates, default_primary, judged_direction, number_or_percent
from .compare_sequential import Schedule
from .compare_tests import Design
from .executors import Executor, InProcess, Job
from .names import resolve_metric
from .runs import Progress, gather
from .settings import FleetFile, parse_assignment, workload_names
from .store import RunStore, run_key
from .table import flatten_summary, frame_of_rows, metric_columns, workload_prefixes
from .verdicts import Condition, detections, differences

__all__ = ["Arm", "Detection", "ComparisonResult", "run_compare", "parse_detect"]

_DECIDED = ("better", "worse", "no-change-that-matters", "not-tested-constant", "set-by-arms")
"""Primary verdicts that end a sequential comparison (a constant cannot be decided further)."""

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
    change, relative = number_or_percent(text, raw, "--detect")
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
    primary: list[str] = field(default_factory=list)
    """The primary metrics (study columns), in the order given."""
    margins: list[Margin] = field(default_factory=list)
    """The margins, each naming its resolved column."""
    rate_of: dict[str, str] = field(default_factory=dict)
    """Each count's rate column (the count is judged as the rate)."""
    overall: dict[str, Overall] = field(default_factory=dict)
    """The overall line by condition code."""
    sequential: Schedule | None = None
    """The planned looks of a sequential comparison (None: a fixed number of seeds)."""
    looks_taken: list[int] = field(default_factory=list)
    """Seeds in hand at each look taken (one look for a fixed design)."""
    stopped: str = "fixed"
    """Why the comparison stopped: ``fixed`` (all seeds), ``decided`` or ``budget``."""


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


def _columns(summary: dict[str, Any]) -> list[str]:
    """A summary's study columns and the rate columns the comparison adds for its counts."""
    columns = list(flatten_summary(summary))
    rates = [rate for rate, _ in count_rates(columns, workload_prefixes(columns)).values()]
    return columns + [rate for rate in rates if rate not in columns]


def _resolve(primary: Sequence[str] | None, margins: Sequence[Margin], columns: list[str],
             workloads: Sequence[str]) -> tuple[list[str], list[Margin]]:
    """The primary metrics and margins as study columns; raises ConfigError naming the option
    for an unknown name, a count (naming its rate) or a neutral primary metric."""
    prefixes = workload_prefixes(columns)
    rates = {count: rate for count, (rate, _) in count_rates(columns, prefixes).items()}
    rate_of = dict(rates)
    problems: list[str] = []
    chosen: list[str] = []
    for name in (primary if primary else default_primary(workloads)):
        option = "--primary" if primary else "the default --primary"
        try:
            metric = resolve_metric(name, columns, option)
        except ConfigError as exc:
            problems += exc.problems
            continue
        if metric in rates:
            problems.append(f"{option} {name}: a count is judged as a rate; name {rates[metric]}")
        elif judged_direction(metric, prefixes, rate_of) is None:
            problems.append(f"{option} {name}: {metric} is neutral (no direction is better); a primary metric "
                            "needs one (docs/studies.md, Compare)")
        elif metric not in chosen:
            chosen.append(metric)
    resolved: list[Margin] = []
    for margin in margins:
        try:
            metric = resolve_metric(margin.metric, columns, "--margin")
        except ConfigError as exc:
            problems += exc.problems
            continue
        if metric in rates:
            problems.append(f"--margin {margin.metric}={margin.text}: a count is judged as a rate; give the "
                            f"margin for {rates[metric]}")
        elif any(m.metric == metric for m in resolved):
            problems.append(f"--margin {margin.metric}={margin.text}: {metric} has a margin already")
        else:
            resolved.append(Margin(metric, margin.value, margin.relative))
    if problems:
        raise ConfigError(problems)
    return chosen, resolved


def _check(detect: Sequence[Detection], primary: Sequence[str] | None, margins: Sequence[Margin],
           workloads: Sequence[str]) -> Any:
    """A check of the first summary: every ``--detect``, ``--primary`` and ``--margin`` metric
    names a column (and a primary metric a directed one)."""
    def check(summary: dict[str, Any]) -> None:
        columns = _columns(summary)
        problems = []
        for wanted in detect:
            try:
                resolve_metric(wanted.metric, columns, "--detect")
            except ConfigError as exc:
                problems.extend(exc.problems)
        try:
            _resolve(primary, margins, columns, workloads)
        except ConfigError as exc:
            problems.extend(exc.problems)
        if problems:
            raise ConfigError(problems)
    return check


def _configs(conditions: list[tuple[Condition, FleetFile]], baseline: Arm, candidate: Arm,
             offset: int) -> tuple[list[tuple[Condition, Arm, Any, int]], list[str]]:
    """Every condition's validated configuration of each arm with its seed offset, and the
    workloads both arms train (refused when they differ)."""
    configs: list[tuple[Condition, Arm, Any, int]] = []
    names: dict[str, list[str]] = {}
    for condition, fleet_file in conditions:
        for arm, option, shift in ((baseline, "--baseline", 0), (candidate, "--candidate", offset)):
            config = _arm_config(fleet_file, arm, option)
            names[arm.name] = workload_names(config)
            configs.append((condition, arm, config, shift))
    _same_workloads(baseline, candidate, names)
    return configs, names[baseline.name]


Planned = tuple[Condition, Arm, int, int, str]
"""One run of the plan: condition, arm, seed, run seed, run key."""


def _plan(configs: list[tuple[Condition, Arm, Any, int]], seeds: Sequence[int]) -> tuple[list[Job], list[Planned]]:
    """The runs of every condition and arm under ``seeds``."""
    jobs: list[Job] = []
    plan: list[Planned] = []
    for condition, arm, config, offset in configs:
        for seed in seeds:
            key = run_key(config, seed + offset)
            jobs.append(Job(key=key, config=config, seed=seed + offset, label=f"{arm.name} ({condition.text})"))
            plan.append((condition, arm, seed, seed + offset, key))
    return jobs, plan


def _frame(plan: list[Planned], summaries: dict[str, dict[str, Any]]) -> tuple[pd.DataFrame, dict[str, str]]:
    """The runs table (every study column and the counts' rates) and each count's rate column."""
    rows = []
    for condition, arm, seed, run_seed, key in plan:
        flat = flatten_summary(summaries[key])
        flat.pop("seed", None)
        rows.append({"condition": condition.code, "stress_file": condition.stress_file, "arm": arm.name,
                     "arm_settings": ", ".join(arm.overrides), "seed": seed, "run_seed": run_seed, **flat})
    runs = frame_of_rows(rows)
    return add_rates(runs, workload_prefixes(runs.columns))


def _shifted(progress: Progress | None, before: int, total: int) -> Progress | None:
    """A progress callback for one batch that counts the batches before it and the whole budget."""
    if progress is None:
        return None
    return lambda done, _: progress(before + done, total)


def _decided(found: pd.DataFrame, primary: list[str]) -> bool:
    """True when every primary metric of every condition has a verdict of :data:`_DECIDED`."""
    rows = found[found["metric"].isin(primary)]
    return bool(len(rows)) and bool(rows["verdict"].isin(_DECIDED).all())


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
    primary: Sequence[str] | None = None,
    margins: Sequence[Margin] = (),
    sequential: Schedule | None = None,
) -> ComparisonResult:
    """Run both arms under ``seeds`` (and under ``stress`` if given) and compare them.

    ``candidate_seed_offset`` runs the candidate under seed + offset instead of the same seed;
    0 (the default) pairs runs on common random numbers, anything else breaks the pairing on
    purpose (for checking the method). ``primary`` names the primary metrics (None: the
    default list), ``margins`` the equivalence margins. With ``sequential`` the seeds are the
    budget, run in the schedule's batches until every primary metric is decided. Raises
    ConfigError for a bad setting, stress file, metric name, power or schedule; FleetsimError
    when a run fails.
    """
    if not seeds:
        raise ConfigError(["--seeds: expected at least 1"])
    if not 0.0 < power < 1.0:
        raise ConfigError([f"--power {power}: expected a number between 0 and 1, e.g. 0.8"])
    if sequential is not None and sequential.looks[-1] != len(seeds):
        raise ConfigError([f"--seed-budget: the schedule ends at {sequential.looks[-1]} seeds but {len(seeds)} "
                           "were given"])
    for arm, option in ((baseline, "--baseline"), (candidate, "--candidate")):
        for item in arm.overrides:
            parse_assignment(item, option)
    started = time.perf_counter()
    conditions: list[tuple[Condition, FleetFile]] = [(Condition("as-configured"), base)]
    if stress is not None:
        conditions.append((Condition("stressed", str(stress)), base.with_stress(stress)))
    configs, workloads = _configs(conditions, baseline, candidate, candidate_seed_offset)
    store = RunStore(Path(folder) / "cells") if folder is not None else None
    runner = executor or InProcess()
    kept = [c for c, _ in conditions]
    everything = {job.key for job in _plan(configs, seeds)[0]}
    looks = list(sequential.looks) if sequential is not None else [len(seeds)]
    summaries: dict[str, dict[str, Any]] = {}
    reused = 0
    for k, n in enumerate(looks):
        jobs, plan = _plan(configs, list(seeds)[:n])
        new = [job for job in jobs if job.key not in summaries]
        check = _check(detect, primary, margins, workloads) if not summaries else None
        found, again = gather(new, runner, store, _shifted(progress, len(summaries), len(everything)), check)
        summaries.update(found)
        reused += again
        runs, rate_of = _frame(plan, summaries)
        metrics = metric_columns(runs, exclude=["run_seed"])
        chosen, resolved = _resolve(primary, margins, metrics, workloads)
        design = Design(tuple(looks[: k + 1]), sequential.fractions) if sequential is not None else None
        judged = partial(differences, runs, kept, metrics, baseline.name, candidate.name, power, primary=chosen,
                         margins={m.metric: m for m in resolved}, rate_of=rate_of, design=design)
        last = k == len(looks) - 1
        found_d = judged(exact=last)
        decided = sequential is not None and _decided(found_d, chosen)
        if decided or last:
            found_d = found_d if last else judged(exact=True)
            break
    first = summaries[plan[0][4]]
    types = next(iter(first["workloads"].values()), {}) if workloads else first
    return ComparisonResult(
        base=base, baseline=baseline, candidate=candidate, seeds=list(seeds)[:n],
        candidate_seed_offset=candidate_seed_offset, conditions=kept, runs=runs, differences=found_d,
        detections=detections(runs, kept, metrics, baseline.name, candidate.name, detect, power),
        power=power, caution=first.get("caution", ""), executor=runner.description, reused=reused,
        wall_s=time.perf_counter() - started, type_names=list(types.get("bias", {}).get("by_device_type", {})),
        workloads=workloads, primary=chosen, margins=resolved, rate_of=rate_of,
        overall={c.code: overall(found_d[found_d["condition"] == c.code], chosen) for c in kept},
        sequential=sequential, looks_taken=looks[: k + 1],
        stopped="fixed" if sequential is None else "decided" if decided else "budget",
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
