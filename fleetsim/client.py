"""The on-device runtime for a whole cohort at once: download, train, upload, dropout.

When a round accepts a cohort, every member's task is resolved together from its traits:

- download, training and upload times (:func:`task_times`, the one place of the formula);
- interruptions, each measured from acceptance: a required signal turning off (each
  device's chains followed exactly from its check-in, :meth:`fleetsim.signals.SignalState.paths`:
  the rates change with the local hour), a crash (exponential at the crash hazard), the OS
  execution limit, and the battery falling below the workload's minimum (the level seen at
  check-in, then piecewise-linear: the phase's power draw, less the charger whenever the
  charging signal is on, so a device plugged in mid-task charges; capped at 100%).

The earliest interruption before the task's end is the dropout, with its cause and phase.
Disruptions apply by the factor in force when the task starts, for its whole length.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .chains import Paths, SignalState
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
    radio_w: np.ndarray
    train_w: np.ndarray
    model_bytes: float
    update_bytes: float
    paths: Paths  # every chain's path from check-in (absolute times)
    battery_points: np.ndarray  # [n, P] relative times where the battery's slope may change
    battery_levels: np.ndarray  # [n, P] level (%) at each point
    battery_slopes: np.ndarray  # [n, P] slope (%/s) from each point to the next

    @property
    def task_s(self) -> np.ndarray:
        return self.download_s + self.train_s + self.upload_s

    def phase_at(self, rel: np.ndarray) -> np.ndarray:
        """Phase code at relative time ``rel`` (download 1, train 2, upload 3)."""
        phase = np.full(rel.shape, 3, dtype=np.int8)
        phase[rel < self.download_s + self.train_s] = 2
        phase[rel < self.download_s] = 1
        return phase

    def battery_at(self, rel: np.ndarray) -> np.ndarray:
        """Battery level (%) at relative time ``rel`` (within the task)."""
        rel = np.clip(rel, 0.0, self.task_s)
        j = np.maximum((self.battery_points <= rel[:, None]).sum(axis=1) - 1, 0)
        rows = np.arange(rel.size)
        level = self.battery_levels[rows, j] + self.battery_slopes[rows, j] * (rel - self.battery_points[rows, j])
        return np.clip(level, 0.0, 100.0)

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


def _signal_events(paths: Paths, signals: SignalState, devices: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Every chain change of each device in time order: times [n, M] (inf-padded) and the
    signals' states just after each [S, n, M]."""
    n_chains, n, f = paths.flips.shape
    times = paths.flips.transpose(1, 0, 2).reshape(n, n_chains * f)
    chain = np.repeat(np.arange(n_chains), f)[None, :].repeat(n, axis=0)
    order = np.argsort(times, axis=1, kind="stable")
    times = np.take_along_axis(times, order, axis=1)
    chain = np.take_along_axis(chain, order, axis=1)
    flipped = (chain[None, :, :] == np.arange(n_chains)[:, None, None]) & np.isfinite(times)[None]
    states = paths.state0[:, :, None] ^ (np.cumsum(flipped, axis=2) % 2 == 1)  # [C, n, M]
    covers = signals.tables.covers[signals.group[devices]].T  # [S, n]
    on = states[1:] | (states[0][None] & covers[:, :, None])
    return times, on


def _battery_path(
    cohort_times: tuple[np.ndarray, np.ndarray, np.ndarray], start_pct: np.ndarray, charge_changes: np.ndarray,
    charging0: np.ndarray, train_w: np.ndarray, radio_w: np.ndarray, charge_w: np.ndarray, battery_wh: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The battery level as a piecewise-linear path from acceptance to the task's end.

    ``charge_changes`` [n, M] are the relative times the charging signal changed (inf-padded;
    negative: while the check-in was held), ``charging0`` its state at check-in. Returns the
    points [n, P], the level at each (%) and the slope (%/s) from each to the next; the level
    is capped at 100% (a capped stretch is flat)."""
    d, tr, up = cohort_times
    t_end = d + tr + up
    inside = np.where(np.isfinite(charge_changes), np.clip(charge_changes, 0.0, None), np.inf)
    points = np.concatenate([np.zeros((d.size, 1)), d[:, None], (d + tr)[:, None], t_end[:, None],
                             np.minimum(inside, t_end[:, None])], axis=1)
    points.sort(axis=1)
    scale = 100.0 / (3600.0 * battery_wh)  # percent per joule
    levels = np.empty(points.shape)
    slopes = np.zeros(points.shape)
    level = start_pct.copy()
    for j in range(points.shape[1]):
        levels[:, j] = level
        if j == points.shape[1] - 1:
            break
        a, b = points[:, j], points[:, j + 1]
        mid = 0.5 * (a + b)
        in_train = (mid >= d) & (mid < d + tr)
        draw = np.where(in_train, train_w, radio_w)
        changes = (charge_changes <= mid[:, None]).sum(axis=1)
        charging = charging0 ^ (changes % 2 == 1)
        slope = (np.where(charging, charge_w, 0.0) - draw) * scale
        slope = np.where(level >= 100.0, np.minimum(slope, 0.0), slope)
        slopes[:, j] = slope
        level = np.minimum(level + slope * (b - a), 100.0)
    return points, levels, slopes


def _battery_crossing(points: np.ndarray, levels: np.ndarray, slopes: np.ndarray, min_pct: float) -> np.ndarray:
    """Relative time the level first falls below ``min_pct`` (inf if never)."""
    crossing = np.full(points.shape[0], np.inf)
    for j in range(points.shape[1] - 1):
        a, b = points[:, j], points[:, j + 1]
        level, slope = levels[:, j], slopes[:, j]
        falls = np.isinf(crossing) & (b > a) & (slope < 0) & (level + slope * (b - a) < min_pct)
        with np.errstate(divide="ignore", invalid="ignore"):
            when = a + (level - min_pct) / -slope
        crossing = np.where(falls, np.maximum(when, a), crossing)
    return crossing


def _signal_losses(work: Workload, rel: np.ndarray, on: np.ndarray) -> list[np.ndarray]:
    """Per signal, the relative time it first turns off (inf: never, or not required), from the
    chain changes at relative times ``rel`` [n, M] and the signals' states after each [S, n, M].
    A loss while the check-in was held counts at acceptance (0)."""
    n = rel.shape[0]
    losses = [np.full(n, np.inf) for _ in SIGNALS]
    if not rel.size:  # no chain changed in the whole cohort
        return losses
    for s, name in enumerate(SIGNALS):
        if name in work.requires:
            off = ~on[s] & np.isfinite(rel)
            first = np.where(off.any(axis=1), rel[np.arange(n), np.argmax(off, axis=1)], np.inf)
            losses[s] = np.maximum(first, 0.0)
    return losses


def _charging_changes(rel: np.ndarray, on: np.ndarray, charging0: np.ndarray) -> np.ndarray:
    """Relative times [n, m] the charging signal changed (inf-padded), from its state at check-in."""
    charging_signal = on[SIGNALS.index("charging")]
    previous = np.concatenate([charging0[:, None], charging_signal[:, :-1]], axis=1)
    changes = np.where((charging_signal != previous) & np.isfinite(rel), rel, np.inf)
    return changes[:, np.isfinite(changes).any(axis=0)]  # columns with a change somewhere


def resolve_cohort(
    config: Config,
    fleet_arrays: dict[str, np.ndarray],
    device: np.ndarray,
    accept_s: np.ndarray,
    checkin_s: np.ndarray,
    charging: np.ndarray,
    battery_pct: np.ndarray,
    signals: SignalState,
    rng: np.random.Generator,
    type_names: tuple[str, ...],
    region_names: tuple[str, ...],
) -> Cohort:
    """Resolve every accepted device's task.

    ``fleet_arrays`` maps trait names to per-device arrays (already indexed by ``device``);
    ``checkin_s`` is when each check-in came (the server may hold it until ``accept_s``: a
    signal seen on at check-in may turn off while held, and the device then drops out at
    once); ``charging`` and ``battery_pct`` are as seen at check-in; ``signals`` holds the
    chains' last looks, from which each device's path is followed.
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
    download_s, train_s, upload_s = task_times(
        work, fleet_arrays["down_mbps"], fleet_arrays["up_mbps"], fleet_arrays["samples"],
        fleet_arrays["sample_cost_s"], bandwidth, compute,
    )
    task_s = download_s + train_s + upload_s
    hazard = work.crash_rate / 3600.0 * crash  # crash_rate is per hour
    crash_draw = rng.exponential(1.0, size=n)
    with np.errstate(divide="ignore"):
        crash_at = np.where(hazard > 0, crash_draw / hazard, np.inf)
    # Nothing of the signals matters after the task has certainly ended.
    ends_by = np.minimum(np.minimum(task_s, crash_at), work.execution_limit)
    followed = [1 + SIGNALS.index(name) for name in set(work.requires) | {"charging"}]
    paths = signals.paths(device, checkin_s, accept_s + ends_by, rng, followed)
    times, on = _signal_events(paths, signals, device)
    rel = times - accept_s[:, None]
    candidates = [np.full(n, np.inf)] * len(CAUSES)
    candidates[1:1 + len(SIGNALS)] = _signal_losses(work, rel, on)
    points, levels, slopes = _battery_path(
        (download_s, train_s, upload_s), battery_pct, _charging_changes(rel, on, charging), charging,
        fleet_arrays["train_power_w"], fleet_arrays["radio_power_w"], fleet_arrays["charge_power_w"],
        fleet_arrays["battery_wh"],
    )
    candidates[_BATTERY] = _battery_crossing(points, levels, slopes, work.min_battery)
    candidates[_EXECUTION_LIMIT] = np.full(n, work.execution_limit)
    candidates[_CRASH] = crash_at
    stacked = np.stack(candidates[1:], axis=0)
    first = np.argmin(stacked, axis=0)
    first_at = stacked[first, np.arange(n)]
    drops = first_at < task_s
    return Cohort(
        device=device,
        accept_s=accept_s,
        download_s=download_s,
        train_s=train_s,
        upload_s=upload_s,
        drop_at=np.where(drops, first_at, np.inf),
        cause=np.where(drops, first + 1, 0).astype(np.int8),
        battery_start_pct=battery_pct,
        radio_w=fleet_arrays["radio_power_w"],
        train_w=fleet_arrays["train_power_w"],
        model_bytes=work.model_size,
        update_bytes=work.upload_bytes,
        paths=paths,
        battery_points=points,
        battery_levels=levels,
        battery_slopes=slopes,
    )
