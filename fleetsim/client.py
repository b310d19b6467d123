"""The on-device runtime for a whole cohort at once: download, train, upload, dropout.

When a round accepts a cohort, every member's task is resolved together from its traits:

- download, training and upload times (:func:`task_times`, the one place of the formula);
- interruptions, each measured from acceptance: a required signal turning off
  (exponential with the signal's mean on-duration: its off-rate does not depend on the
  hour), a crash (exponential at the crash hazard), the OS execution limit, and the battery
  falling below the workload's minimum (level drawn at check-in, then piecewise-linear drain
  from the phase's power draw less the charger while plugged in).

The earliest interruption before the task's end is the dropout, with its cause and phase.
Disruptions apply by the factor in force when the task starts, for its whole length.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .config import SIGNALS, Config, Disruption, Workload
from .events import CAUSES

__all__ = ["Cohort", "resolve_cohort", "disruption_factor", "task_times"]

_BATTERY = CAUSES.index("battery-low")
_EXECUTION_LIMIT = CAUSES.index("execution-limit")
_CRASH = CAUSES.index("crash")


def task_times(
    work: Workload,
    down_mbps: np.ndarray,
    up_mbps: np.ndarray,
    samples: np.ndarray,
    sample_cost_s: np.ndarray,
    bandwidth: np.ndarray | float = 1.0,
    compute: np.ndarray | float = 1.0,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Download, training and upload time of each device's task, s.

    download = model bytes * 8 / (down Mbit/s * 10**6 * ``bandwidth``), upload likewise with
    the update's bytes; training = ceil(samples / batch) * batch * epochs * per-sample cost s
    * ``compute`` (the last batch of an epoch is padded to full size). ``bandwidth`` and
    ``compute`` are disruption factors (1: none). A zero rate gives an infinite time.
    """
    with np.errstate(divide="ignore"):
        download_s = work.model_size * 8.0 / (down_mbps * 1e6 * bandwidth)
        upload_s = work.upload_bytes * 8.0 / (up_mbps * 1e6 * bandwidth)
    padded = np.ceil(samples / work.batch_size) * work.batch_size
    train_s = padded * work.epochs * sample_cost_s * compute
    return download_s, train_s, upload_s


def disruption_factor(
    disruptions: list[Disruption],
    kind: str,
    t: np.ndarray,
    device_type: np.ndarray,
    region: np.ndarray,
    type_names: tuple[str, ...],
    region_names: tuple[str, ...],
) -> np.ndarray:
    """Product of the ``kind`` disruption factors in force at ``t`` for each device."""
    factor = np.ones(t.shape)
    for event in disruptions:
        if event.kind != kind:
            continue
        mask = (t >= event.start) & (t < event.start + event.duration)
        if event.device_types:
            codes = [type_names.index(n) for n in event.device_types]
            mask &= np.isin(device_type, codes)
        if event.regions:
            codes = [region_names.index(n) for n in event.regions]
            mask &= np.isin(region, codes)
        factor[mask] *= event.factor
    return factor


@dataclass
class Cohort:
    """Resolved tasks of the devices one round accepted (times relative to acceptance, s)."""

    device: np.ndarray
    accept_s: np.ndarray
    download_s: np.ndarray
    train_s: np.ndarray
    upload_s: np.ndarray
    drop_at: np.ndarray  # relative time of dropout, inf when the task would complete
    cause: np.ndarray  # int8 code into CAUSES
    battery_start_pct: np.ndarray
    charging_for: np.ndarray  # relative time the charger stays connected (0: unplugged)
    radio_w: np.ndarray
    train_w: np.ndarray
    charge_w: np.ndarray
    battery_wh: np.ndarray
    signal_off_at: np.ndarray  # [S, n] relative time each tracked signal turns off (inf: not tracked)
    model_bytes: float
    update_bytes: float

    @property
    def task_s(self) -> np.ndarray:
        return self.download_s + self.train_s + self.upload_s

    def phase_at(self, rel: np.ndarray) -> np.ndarray:
        """Phase code at relative time ``rel`` (download 1, train 2, upload 3)."""
        phase = np.full(rel.shape, 3, dtype=np.int8)
        phase[rel < self.download_s + self.train_s] = 2
        phase[rel < self.download_s] = 1
        return phase

    def work_until(self, rel: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Work done by relative time ``rel``: training s, bytes down, bytes up, energy Wh."""
        d, tr, up = self.download_s, self.train_s, self.upload_s
        down_done = np.clip(rel, 0.0, d)
        train_done = np.clip(rel - d, 0.0, tr)
        up_done = np.clip(rel - d - tr, 0.0, up)
        with np.errstate(invalid="ignore", divide="ignore"):
            bytes_down = self.model_bytes * np.where(d > 0, down_done / d, 1.0)
            bytes_up = self.update_bytes * np.where(up > 0, up_done / up, 1.0)
        bytes_up = np.where(rel >= d + tr, bytes_up, 0.0)
        energy_wh = (self.radio_w * (down_done + up_done) + self.train_w * train_done) / 3600.0
        return train_done, bytes_down, bytes_up, energy_wh


def _battery_crossing(cohort: Cohort, min_pct: float) -> np.ndarray:
    """Relative time the battery level first falls below ``min_pct`` (inf if never)."""
    d = cohort.download_s
    t_end = cohort.task_s
    points = np.stack(
        [np.zeros_like(d), d, d + cohort.train_s, t_end, np.minimum(cohort.charging_for, t_end)], axis=1
    )
    points.sort(axis=1)
    level = cohort.battery_start_pct.copy()
    crossing = np.full(d.shape, np.inf)
    scale = 100.0 / (3600.0 * cohort.battery_wh)  # percent per joule-second of watts
    for j in range(points.shape[1] - 1):
        a, b = points[:, j], points[:, j + 1]
        mid = 0.5 * (a + b)
        in_train = (mid >= d) & (mid < d + cohort.train_s)
        draw = np.where(in_train, cohort.train_w, cohort.radio_w)
        supply = np.where(mid < cohort.charging_for, cohort.charge_w, 0.0)
        slope = (supply - draw) * scale  # percent per second
        end_level = np.minimum(level + slope * (b - a), 100.0)
        falls = np.isinf(crossing) & (end_level < min_pct) & (b > a) & (slope < 0)
        with np.errstate(divide="ignore", invalid="ignore"):
            when = a + (level - min_pct) / -slope
        crossing = np.where(falls, np.maximum(when, a), crossing)
        level = end_level
    return crossing


def resolve_cohort(
    config: Config,
    fleet_arrays: dict[str, np.ndarray],
    device: np.ndarray,
    accept_s: np.ndarray,
    held_s: np.ndarray,
    charging: np.ndarray,
    battery_pct: np.ndarray,
    mean_on_s: np.ndarray,
    rng: np.random.Generator,
    type_names: tuple[str, ...],
    region_names: tuple[str, ...],
) -> Cohort:
    """Resolve every accepted device's task.

    ``fleet_arrays`` maps trait names to per-device arrays (already indexed by ``device``);
    ``held_s`` is how long the server held each check-in before accepting it (signals seen on
    at check-in may turn off while held: such a device drops out at once); ``charging`` and
    ``battery_pct`` are as seen at check-in; ``mean_on_s`` is [S, n], the mean on-duration of
    each signal for each device.
    """
    work = config.workload
    n = device.size
    dtype_codes, region_codes = fleet_arrays["device_type"], fleet_arrays["region"]
    disruptions = config.disruptions

    def factor(kind: str) -> np.ndarray:
        return disruption_factor(disruptions, kind, accept_s, dtype_codes, region_codes, type_names, region_names)

    bandwidth = factor("network-slowdown")
    compute = factor("compute-drift")
    crash = factor("crash-surge")
    model_bytes = work.model_size
    update_bytes = work.upload_bytes
    download_s, train_s, upload_s = task_times(
        work, fleet_arrays["down_mbps"], fleet_arrays["up_mbps"], fleet_arrays["samples"],
        fleet_arrays["sample_cost_s"], bandwidth, compute,
    )

    # Each interruption as a relative time; draw all of them so the stream does not depend on
    # which ones the workload turns on (common random numbers across settings).
    # Time each signal stays on, counted from the check-in (memoryless), then from acceptance.
    signal_off = np.maximum(rng.exponential(1.0, size=(len(SIGNALS), n)) * mean_on_s - held_s, 0.0)
    crash_draw = rng.exponential(1.0, size=n)
    charging_off = signal_off[SIGNALS.index("charging")]
    charging_for = np.where(charging, charging_off, 0.0)

    tracked = np.full((len(SIGNALS), n), np.inf)
    for s, name in enumerate(SIGNALS):
        if name in work.requires:
            tracked[s] = signal_off[s]
    tracked[SIGNALS.index("charging")] = np.where(charging, charging_off, np.inf)

    hazard = work.crash_rate / 3600.0 * crash  # crash_rate is per hour
    with np.errstate(divide="ignore"):
        crash_at = np.where(hazard > 0, crash_draw / hazard, np.inf)
    cohort = Cohort(
        device=device,
        accept_s=accept_s,
        download_s=download_s,
        train_s=train_s,
        upload_s=upload_s,
        drop_at=np.full(n, np.inf),
        cause=np.zeros(n, dtype=np.int8),
        battery_start_pct=battery_pct,
        charging_for=charging_for,
        radio_w=fleet_arrays["radio_power_w"],
        train_w=fleet_arrays["train_power_w"],
        charge_w=fleet_arrays["charge_power_w"],
        battery_wh=fleet_arrays["battery_wh"],
        signal_off_at=tracked,
        model_bytes=model_bytes,
        update_bytes=update_bytes,
    )
    _first_interruption(cohort, work, signal_off, crash_at)
    return cohort


def _first_interruption(cohort: Cohort, work: Workload, signal_off: np.ndarray, crash_at: np.ndarray) -> None:
    """Set the cohort's ``drop_at`` and ``cause``: the earliest interruption before the task
    ends (a required signal off, battery below the minimum, the execution limit, a crash), if any.

    ``signal_off`` is [S, n], the time after acceptance each signal turns off; ``crash_at``
    the time of a crash (inf: none), s.
    """
    n = cohort.device.size
    candidates = [np.full(n, np.inf)] * len(CAUSES)
    for s, name in enumerate(SIGNALS):
        if name in work.requires:
            candidates[1 + s] = signal_off[s]
    candidates[_BATTERY] = _battery_crossing(cohort, work.min_battery)
    candidates[_EXECUTION_LIMIT] = np.full(n, work.execution_limit)
    candidates[_CRASH] = crash_at
    stacked = np.stack(candidates[1:], axis=0)
    first = np.argmin(stacked, axis=0)
    first_at = stacked[first, np.arange(n)]
    drops = first_at < cohort.task_s
    cohort.drop_at = np.where(drops, first_at, np.inf)
    cohort.cause = np.where(drops, first + 1, 0).astype(np.int8)
