"""The validated model of a fleet file: fleet (:mod:`.devices`), workload, rounds, selection,
horizon, disruptions."""

from __future__ import annotations

import math
from datetime import datetime, timezone
from typing import Any, Literal

import numpy as np
from pydantic import (
    Field,
    field_serializer,
    field_validator,
    model_validator,
)

from ..units import format_instant
from .fields import (
    _ALL_SIGNALS,
    Count,
    Duration,
    Hazard,
    Instant,
    Percentage,
    PositiveDuration,
    Real,
    SignalName,
    Size,
    _at,
    _listed_once,
    _show,
    _Strict,
)
from .fleetspec import FleetSpec, name_problem
from .impact import FleetImpact
from .jobs import MAIN, Job, merge_sections
from .privacy import Privacy
from .protocol import Pacing, SecureAggregation, UpdateEncoding
from .yamltext import structure_problem


class Workload(_Strict):
    """What one participation asks of a device."""

    model_size: Size = Field(gt=0, description="model download size")
    update_encoding: UpdateEncoding = UpdateEncoding()
    epochs: Count = Field(default=1, ge=1, le=1_000_000)
    batch_size: Count = Field(default=32, ge=1, le=1_000_000_000)
    # Unset or null: no cap. Local work per round is epochs passes over at most max_examples
    # examples, in batches of batch_size, at most max_steps batches (docs/fleet-file.md).
    max_examples: Count | None = Field(default=None, ge=1, le=1_000_000_000)
    max_steps: Count | None = Field(default=None, ge=1, le=1_000_000_000)
    memory_needed: Size = Field(default=0.0, ge=0)
    requires: list[SignalName] = Field(default_factory=lambda: list(_ALL_SIGNALS))
    min_battery: Percentage = Field(default=0.0, ge=0, le=100, description="battery level, %")
    # Unset or null (the default, held as infinity): no limit. A value in the file must be finite.
    execution_limit: PositiveDuration = Field(default=float("inf"))
    crash_rate: Hazard = Field(default=0.0, ge=0, description="crash hazard while working, per hour")
    # Unset or null: the aggregation adds no noise, and no privacy is accounted.
    privacy: Privacy | None = None

    @field_validator("requires")
    @classmethod
    def _unique(cls, value: list[str]) -> list[str]:
        return _listed_once(value, "signal")

    @field_validator("execution_limit", mode="wrap")
    @classmethod
    def _no_limit(cls, value: Any, handler: Any) -> Any:
        return float("inf") if value is None else handler(value)

    @field_serializer("execution_limit")
    def _limit_out(self, value: float) -> float | None:
        # No limit is written as null, so a written configuration reads back as it was.
        return None if math.isinf(value) else value

    @property
    def upload_bytes(self) -> float:
        """Bytes of an encoded update (without secure aggregation's masking)."""
        return self.update_encoding.upload_bytes(self.model_size)

    def local_work(self, samples: Any) -> tuple[Any, Any]:
        """Local work per round of a device holding ``samples`` examples (number or array):
        examples processed (steps x batch size; the last batch of an epoch is padded to full
        size) and the FedAvg weight (the distinct examples trained on). Epochs pass over
        min(samples, ``max_examples``) examples, at most ``max_steps`` batches in all."""
        used = samples if self.max_examples is None else np.minimum(samples, self.max_examples)
        steps = self.epochs * np.ceil(np.divide(used, self.batch_size))
        if self.max_steps is not None:
            steps = np.minimum(steps, self.max_steps)
        processed = steps * self.batch_size
        return processed, np.minimum(used, processed) * 1.0

    @property
    def encode_s(self) -> float:
        """On-device encoding time of an update, s."""
        return self.update_encoding.encode_s(self.model_size)


MIN_CHECKIN_S = 1.0
"""Shortest check-in period, s: each period in a window costs the engine one step."""
MIN_CYCLE_S = 1.0
"""Shortest server loop (selection timeout + aggregation time), s."""


class RoundSettings(_Strict):
    """The server's round protocol."""

    target_reports: Count = Field(ge=1, le=100_000_000)
    over_selection: Real = Field(default=1.3, ge=1.0, le=1000.0)
    selection_timeout: PositiveDuration
    min_reports: Count | None = Field(default=None, ge=1)
    report_deadline: PositiveDuration
    aggregation_time: Duration = Field(default=30.0, ge=0)
    rest: Duration = Field(default=0.0, ge=0)
    checkin_every: Duration = Field(ge=MIN_CHECKIN_S)
    # When an accepted device's task starts: at its acceptance, or once the selection is
    # complete (the server then configures the whole cohort at once).
    configure: Literal["at-acceptance", "after-selection"] = "at-acceptance"
    secure_aggregation: SecureAggregation | None = None
    pacing: Pacing | None = None
    # Rounds open at once: above 1 the next round's selection opens as soon as the current
    # round's selection ends, while it still collects reports.
    in_flight: Count = Field(default=1, ge=1, le=64)

    @model_validator(mode="after")
    def _min_le_target(self) -> RoundSettings:
        if self.min_reports is not None and self.min_reports > self.target_reports:
            raise ValueError(
                f"min_reports ({self.min_reports}) must not exceed target_reports ({self.target_reports})"
            )
        # Each pass of the server's loop lasts at least the selection (when nobody checks
        # in) plus the aggregation: shorter, and simulated time all but stops.
        cycle = self.selection_timeout + self.aggregation_time
        if cycle < MIN_CYCLE_S:
            raise ValueError(
                _at("selection_timeout", f"selection_timeout + aggregation_time must be at least "
                    f"{MIN_CYCLE_S:g}s so that simulated time moves on (got {cycle:g}s)")
            )
        pacing = self.pacing
        if pacing is not None and pacing.min_wait is not None and pacing.min_wait > pacing.max_wait:
            raise ValueError(_at("pacing.min_wait", f"must not exceed pacing.max_wait ({pacing.max_wait:g}s) "
                                 f"(got {pacing.min_wait:g}s)"))
        secure = self.secure_aggregation
        if secure is not None:
            if self.configure != "after-selection":
                raise ValueError(_at("configure", "secure aggregation shares keys within the whole cohort, "
                                     "so tasks must start once it is known: set configure: after-selection "
                                     f"(got {_show(self.configure)})"))
            if secure.needed(self.accept_count) > self.target_reports:
                raise ValueError(_at("secure_aggregation.threshold", (
                    f"every round would fail: the unmasking needs {secure.needed(self.accept_count)} answers "
                    f"(ceil({secure.threshold:g} x {self.accept_count} accepted)) but only reports answer it, "
                    f"at most target_reports = {self.target_reports}; lower the threshold or the over-selection "
                    f"(got {secure.threshold:g})")))
        return self

    @property
    def accept_count(self) -> int:
        """Check-ins a round accepts: ceil(target_reports * over_selection)."""
        return math.ceil(self.target_reports * self.over_selection - 1e-9)

    @property
    def required_reports(self) -> int:
        return self.min_reports if self.min_reports is not None else self.target_reports


class Selection(_Strict):
    """Which check-ins a round accepts: a built-in policy name or ``package.module:Name``.

    ``params`` is free-form (keyword arguments for the policy) but holds only finite numbers,
    nests at most MAX_DEPTH deep and expands (aliases counted each time) to at most
    MAX_NODES values.
    """

    policy: str = Field(default="first-come", max_length=200)
    params: dict[str, Any] = Field(default_factory=dict)

    @field_validator("params")
    @classmethod
    def _plain_data(cls, value: dict[str, Any]) -> dict[str, Any]:
        problem = structure_problem(value)
        if problem is not None:
            where, message = problem
            raise ValueError(_at(where, message) if where else message)
        return value


class Horizon(_Strict):
    """The simulated span. ``warmup`` runs the server before ``start`` so that the fleet's
    rest periods and participation history reach their running state; nothing of the warm-up
    is reported. Unset: as long as the longest rest period of the workloads, at most two days."""

    start: Instant
    duration: PositiveDuration
    warmup: Duration | None = Field(default=None, ge=0)


class Disruption(_Strict):
    """An event in simulated time that changes the fleet or the server for a while.

    kinds: ``network-slowdown`` (``factor`` multiplies bandwidth), ``behaviour-shift``
    (``signal``'s on-probabilities times ``factor``, and/or its hours moved by
    ``shift_hours``), ``crash-surge`` (``factor`` multiplies the crash hazard),
    ``compute-drift`` (``factor`` multiplies per-sample training cost), ``server-outage``
    (no round opens; a running round is lost).
    """

    kind: Literal["network-slowdown", "behaviour-shift", "crash-surge", "compute-drift", "server-outage"]
    start: Duration = Field(description="offset from the horizon start")
    duration: PositiveDuration
    factor: Real = Field(default=1.0, ge=0, le=1e6)
    signal: SignalName | None = None
    shift_hours: Real = Field(default=0.0, ge=-24.0, le=24.0)
    regions: list[str] | None = None
    device_types: list[str] | None = None

    @model_validator(mode="after")
    def _fits_kind(self) -> Disruption:
        if self.kind == "behaviour-shift" and self.signal is None:
            raise ValueError("a behaviour-shift needs 'signal'")
        if self.kind != "behaviour-shift" and (self.signal is not None or self.shift_hours):
            raise ValueError(f"'signal' and 'shift_hours' apply to behaviour-shift, not {self.kind}")
        if self.kind == "server-outage" and (self.regions or self.device_types):
            raise ValueError("a server-outage affects every device; drop 'regions'/'device_types'")
        return self


class WorkloadEntry(_Strict):
    """One of several workloads on one fleet (``workloads.NAME``): its workload, round settings
    and selection, each merged key by key over the file's top-level section of that name
    (:func:`merge_sections`), and under ``sharing.rule: shares`` its ``share``."""

    workload: Workload
    rounds: RoundSettings
    selection: Selection = Selection()
    share: Real | None = Field(default=None, gt=0, le=1e6)


class Sharing(_Strict):
    """How several workloads share the fleet's check-ins (docs/fleet-file.md, ``sharing``)."""

    rule: Literal["priority", "shares"] = "priority"


class Config(_Strict):
    """A whole fleet file."""

    scenario: str = "unnamed scenario"
    horizon: Horizon
    fleet: FleetSpec
    workload: Workload
    rounds: RoundSettings
    selection: Selection = Selection()
    workloads: dict[str, WorkloadEntry] | None = None
    sharing: Sharing | None = None
    disruptions: list[Disruption] = Field(default_factory=list)
    # The model-impact replay's invented task and model (docs/impact.md); the engine ignores it.
    impact: FleetImpact = None  # ImpactSettings | None, its type and region names checked against the fleet

    @model_validator(mode="before")
    @classmethod
    def _merge_workloads(cls, value: Any) -> Any:
        return merge_sections(value)

    @property
    def jobs(self) -> tuple[Job, ...]:
        """The workloads the run trains, each as a Config of one workload (:class:`Job`): the
        ``workloads`` entries in order, or the file's own sections as one job, :data:`MAIN`."""
        if not self.workloads:
            return (Job(MAIN, self, 1.0),)
        shared = {"workloads": None, "sharing": None}
        return tuple(
            Job(name, self.model_copy(update={"workload": entry.workload, "rounds": entry.rounds,
                                              "selection": entry.selection, **shared}),
                float(entry.share) if entry.share is not None else 1.0)
            for name, entry in self.workloads.items()
        )

    @field_validator("scenario")
    @classmethod
    def _title(cls, value: str) -> str:
        problem = name_problem(value, MAX_TITLE_LENGTH)
        if problem:
            raise ValueError(f"the scenario title {problem}")
        return value

    @model_validator(mode="after")
    def _cross_checks(self) -> Config:
        for i, event in enumerate(self.disruptions):
            for key, known in (("regions", self.fleet.regions), ("device_types", self.fleet.device_types)):
                for j, name in enumerate(getattr(event, key) or []):
                    if name not in known:
                        raise ValueError(_at(
                            f"disruptions.{i}.{key}.{j}",
                            f"unknown name {_show(name)}; expected one of {', '.join(known)}",
                        ))
        keep = self.workload.update_encoding.keep_fraction
        if self.rounds.secure_aggregation is not None and keep < 1.0:
            raise ValueError(_at("workload.update_encoding.keep_fraction", (
                "secure aggregation masks a dense update, so a sparsified one cannot be summed under it: "
                f"use keep_fraction 1 or drop rounds.secure_aggregation (got {keep:g})")))
        _check_workloads(self)
        for job in self.jobs if self.workloads else ():
            _check_span(job.config)
        _check_span(self)
        return self


def _check_workloads(config: Config) -> None:
    """Names, sharing and the check-in period of several workloads."""
    entries = config.workloads
    if not entries:
        if config.sharing is not None:
            raise ValueError(_at("sharing", "applies to several workloads: list them under 'workloads' "
                                 "or drop 'sharing'"))
        return
    rule = (config.sharing or Sharing()).rule
    period = config.rounds.checkin_every
    for name, entry in entries.items():
        problem = name_problem(name)
        if problem:
            raise ValueError(_at("workloads", f"workload name {_show(name)} {problem}"))
        key = f"workloads.{name}"
        if rule == "shares" and entry.share is None:
            raise ValueError(_at(f"{key}.share", "sharing.rule is shares: give each workload its share "
                                 "of check-ins (a positive number; shares are relative)"))
        if rule == "priority" and entry.share is not None:
            raise ValueError(_at(f"{key}.share", "sharing.rule is priority (the order of 'workloads'): "
                                 f"drop the share or set sharing.rule: shares (got {entry.share:g})"))
        if entry.rounds.checkin_every != period:
            raise ValueError(_at(f"{key}.rounds.checkin_every", (
                "a device checks in on its own period whatever it trains: every workload has the file's "
                f"rounds.checkin_every ({period:g}s) (got {entry.rounds.checkin_every:g}s)")))
        keep = entry.workload.update_encoding.keep_fraction
        if entry.rounds.secure_aggregation is not None and keep < 1.0:
            raise ValueError(_at(f"{key}.workload.update_encoding.keep_fraction", (
                "secure aggregation masks a dense update, so a sparsified one cannot be summed under it: "
                f"use keep_fraction 1 or drop rounds.secure_aggregation (got {keep:g})")))


MAX_TITLE_LENGTH = 200
"""Longest scenario title, in characters."""

# The instants a run can hold: pandas Timestamps are int64 nanoseconds from the Unix epoch
# (1677-09-21T00:12:43Z to 2262-04-11T23:47:16Z); every datetime lies within years 1-9999.
_FIRST_INSTANT_S = -(2**63 - 1) / 1e9
_LAST_INSTANT_S = (2**63 - 1) / 1e9
# Time simulated around the horizon besides the warm-up: the signals' settling time before it
# (at most 3 days, fleetsim.signals) and after it the last round's selection, deadline and a
# two-hour tail; a margin of a day on each side covers work that ends after the last close.
_SETTLING_S = 4 * 86400.0
_TAIL_MARGIN_S = 2 * 3600.0 + 86400.0


def _check_span(config: Config) -> None:
    """Refuse a horizon whose simulated instants fall outside what pandas and datetime hold."""
    horizon, rounds = config.horizon, config.rounds
    start_s = horizon.start.timestamp()
    warmup = horizon.warmup if horizon.warmup is not None else min(rounds.rest, 2 * 86400.0)
    first = start_s - warmup - _SETTLING_S
    last = start_s + horizon.duration + rounds.selection_timeout + rounds.report_deadline + _TAIL_MARGIN_S
    lo, hi = _FIRST_INSTANT_S + _SETTLING_S, _LAST_INSTANT_S - _TAIL_MARGIN_S
    if not lo <= start_s <= hi:
        raise ValueError(_at("horizon.start", f"expected an instant between {_utc(lo)} and {_utc(hi)}, the "
                             f"range fleetsim can represent (got {_show(format_instant(horizon.start))})"))
    if first < _FIRST_INSTANT_S:
        raise ValueError(_at("horizon.warmup", f"with the warm-up the run would begin before {_utc(lo)}, the "
                             f"earliest instant fleetsim can represent (got {warmup:g}s)"))
    if last > _LAST_INSTANT_S:
        raise ValueError(_at("horizon.duration", f"the run would end after {_utc(hi)}, the latest instant "
                             f"fleetsim can represent (got {horizon.duration:g}s)"))


def _utc(seconds: float) -> str:
    return datetime.fromtimestamp(seconds, tz=timezone.utc).strftime("%Y-%m-%d")
