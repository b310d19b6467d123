"""The on-device runtime for a whole cohort at once: download, train, upload, dropout.

When a round starts a cohort's tasks, every member's task is resolved together from its traits:

- the local work (:meth:`fleetsim.config.Workload.local_work`: epochs over at most ``max_examples`` examples, at most
  ``max_steps`` batches) and the phases' times (:func:`task_times`, the one place of the
  formula): download, (with secure aggregation, key advertisement and key sharing), training
  (the local steps, then the update's encoding), upload;
- interruptions, each measured from the task's start: a required signal turning off (each
  device's chains followed exactly from its check-in, :meth:`fleetsim.chains.SignalState.paths`:
  the rates change with the local hour), a crash (exponential at the crash hazard), the OS
  execution limit, and the battery falling below the workload's minimum (the level seen at
  check-in, then piecewise-linear: the phase's power draw, less the charger whenever the
  charging signal is on, so a device plugged in mid-task charges; capped at 100%;
  :func:`fleetsim.battery.battery_path`).

The earliest interruption before the task's end is the dropout, with its cause and phase;
with secure aggregation the first interruption after it decides whether the device answers
the unmasking. Disruptions apply by the factor in force when the task starts, for its whole
length.

Every draw of a participation (the crash time, the chains' states and changes) is keyed by
the device and the index of the check-in tick that started it (:mod:`fleetsim.keyed`, the
``task`` stream; lanes in :mod:`fleetsim.chains`): a device that checks in at the same tick
in two runs, with the same history, has the same task.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .battery import battery_crossing, battery_path
from .chains import CRASH_LANE, Draws, Paths, SignalState
from .config import SIGNALS, Config, Disruption, Workload
from .config.protocol import SecureAggregation
from .events import CAUSES, PHASES
from .keyed import as_draws

__all__ = ["Cohort", "resolve_cohort", "disruption_factor", "task_times"]

_BATTERY = CAUSES.index("battery-low")
_EXECUTION_LIMIT = CAUSES.index("execution-limit")
_CRASH = CAUSES.index("crash")
_PLAIN = ("download", "train", "upload")
_SECURE = ("download", "key-advertisement", "key-sharing", "train", "upload")


def task_times(
    work: Workload,
    down_mbps: np.ndarray,
    up_mbps: np.ndarray,
    samples: np.ndarray,
    sample_cost_s: np.ndarray,
    bandwidth: np.ndarray | float = 1.0,
    compute: np.ndarray | float = 1.0,
    upload_bytes: float | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Download, training and upload time of each device's task, s.

    download = model bytes * 8 / (down Mbit/s * 10**6 * ``bandwidth``), upload likewise with
    ``upload_bytes`` (default: the encoded update's, :meth:`Workload.upload_bytes`);
    training = (examples processed (:meth:`Workload.local_work`) * per-sample cost + the encoding
    time) * ``compute``. ``bandwidth`` and ``compute`` are disruption factors (1: none). A
    zero rate gives an infinite time.
    """
    upload = work.upload_bytes if upload_bytes is None else upload_bytes
    with np.errstate(divide="ignore"):
        download_s = work.model_size * 8.0 / (down_mbps * 1e6 * bandwidth)
        upload_s = upload * 8.0 / (up_mbps * 1e6 * bandwidth)
    processed, _ = work.local_work(samples)
    train_s = (processed * sample_cost_s + work.encode_s) * compute
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
    """Resolved tasks of the devices one round started (times relative to the start, s).

    The task runs its phases in time order (``phases``, codes into PHASES); with secure
    aggregation a device whose report arrived on time then answers the unmasking, for
    ``unmask_s``, from the round's close."""

    device: np.ndarray
    accept_s: np.ndarray  # when each task started (absolute, s)
    phases: tuple[int, ...]  # phase codes in time order
    durations: np.ndarray  # [K, n] each phase's time
    powers: np.ndarray  # [K, n] each phase's draw, W
    bytes_down: np.ndarray  # [K] bytes each phase brings down
    bytes_up: np.ndarray  # [K] bytes each phase sends up
    examples: np.ndarray  # examples the whole local work processes
    weight: np.ndarray  # FedAvg weight of the report
    local_s: np.ndarray  # time of the local steps (the training phase less the encoding)
    drop_at: np.ndarray  # relative time of dropout, inf when the task would complete
    cause: np.ndarray  # int8 code into CAUSES
    interrupt_at: np.ndarray  # first interruption at any time (inf: none before the paths end)
    interrupt_cause: np.ndarray  # its cause
    unmask_s: np.ndarray  # unmasking time (0 without secure aggregation)
    unmask_bytes: float  # bytes the unmasking sends up
    battery_start_pct: np.ndarray
    paths: Paths  # every chain's path from check-in (absolute times)
    battery_points: np.ndarray  # [n, P] relative times where the battery's slope may change
    battery_levels: np.ndarray  # [n, P] level (%) at each point
    battery_slopes: np.ndarray  # [n, P] slope (%/s) from each point to the next

    def _phase(self, name: str) -> np.ndarray:
        return self.durations[self.phases.index(PHASES.index(name))]

    @property
    def download_s(self) -> np.ndarray:
        return self._phase("download")

    @property
    def train_s(self) -> np.ndarray:
        return self._phase("train")

    @property
    def upload_s(self) -> np.ndarray:
        return self._phase("upload")

    @property
    def ends(self) -> np.ndarray:
        """[K, n] relative time each phase ends."""
        return np.cumsum(self.durations, axis=0)

    @property
    def task_s(self) -> np.ndarray:
        return self.durations.sum(axis=0)

    def phase_at(self, rel: np.ndarray) -> np.ndarray:
        """Phase code at relative time ``rel`` (within the task; the last phase after it)."""
        k = np.minimum((self.ends <= rel[None, :]).sum(axis=0), len(self.phases) - 1)
        return np.asarray(self.phases, dtype=np.int8)[k]

    def battery_at(self, rel: np.ndarray) -> np.ndarray:
        """Battery level (%) at relative time ``rel`` (within the task)."""
        rel = np.clip(rel, 0.0, self.task_s)
        j = np.maximum((self.battery_points <= rel[:, None]).sum(axis=1) - 1, 0)
        rows = np.arange(rel.size)
        level = self.battery_levels[rows, j] + self.battery_slopes[rows, j] * (rel - self.battery_points[rows, j])
        return np.clip(level, 0.0, 100.0)

    def work_until(
        self, rel: np.ndarray, unmask_from: np.ndarray | None = None,
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Work done by relative time ``rel``: training s, bytes down, bytes up, energy Wh and
        examples processed. ``unmask_from``: when each device began answering the unmasking
        (inf: it did not); its time to ``rel`` adds radio energy and the unmasking's bytes."""
        ends = self.ends
        starts = ends - self.durations
        done = np.clip(rel[None, :] - starts, 0.0, self.durations)  # [K, n]
        with np.errstate(invalid="ignore", divide="ignore"):
            share = np.where(self.durations > 0, done / self.durations, (rel[None, :] >= starts) * 1.0)
        down = (share * self.bytes_down[:, None]).sum(axis=0)
        up = (share * self.bytes_up[:, None]).sum(axis=0)
        energy_wh = (self.powers * done).sum(axis=0) / 3600.0
        train_done = done[self.phases.index(PHASES.index("train"))]
        with np.errstate(invalid="ignore", divide="ignore"):
            steps_share = np.where(self.local_s > 0, np.minimum(train_done / self.local_s, 1.0), 1.0)
        reached = rel >= starts[self.phases.index(PHASES.index("train"))]
        examples = np.where(reached, self.examples * steps_share, 0.0)
        if unmask_from is not None:
            spent = np.clip(rel - unmask_from, 0.0, self.unmask_s)
            spent = np.where(np.isfinite(unmask_from), spent, 0.0)
            with np.errstate(invalid="ignore", divide="ignore"):
                up += self.unmask_bytes * np.where(self.unmask_s > 0, spent / self.unmask_s, np.isfinite(unmask_from))
            energy_wh += self.powers[0] * spent / 3600.0  # radio power (the download's draw)
        return train_done, down, up, energy_wh, examples


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


def _signal_losses(work: Workload, rel: np.ndarray, on: np.ndarray) -> list[np.ndarray]:
    """Per signal, the relative time it first turns off (inf: never, or not required), from the
    chain changes at relative times ``rel`` [n, M] and the signals' states after each [S, n, M].
    A loss while the device waited to start counts at its start (0)."""
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


def _phases(
    config: Config, arrays: dict[str, np.ndarray], n: int, bandwidth: np.ndarray, compute: np.ndarray,
) -> tuple[tuple[str, ...], np.ndarray, np.ndarray, np.ndarray, np.ndarray, tuple[np.ndarray, float]]:
    """The task's phases in time order for a cohort of ``n`` started devices: names, times
    [K, n], draws [K, n], bytes down and up [K], and the unmasking's times [n] and bytes up
    (zero without secure aggregation)."""
    work, secure = config.workload, config.rounds.secure_aggregation
    accepted = max(n, 1)
    upload = work.upload_bytes
    if secure is not None:
        bits = SecureAggregation.masked_bits(work.update_encoding.bits_per_weight, accepted)
        upload = work.update_encoding.weights(work.model_size) * bits / 8.0
    down_s, train_s, up_s = task_times(work, arrays["down_mbps"], arrays["up_mbps"], arrays["samples"],
                                       arrays["sample_cost_s"], bandwidth, compute, upload)
    times = {"download": down_s, "train": train_s, "upload": up_s}
    moved = {"download": (work.model_size, 0.0), "train": (0.0, 0.0), "upload": (0.0, upload)}
    names = _PLAIN if secure is None else _SECURE
    unmask_s, unmask_bytes = np.zeros(n), 0.0
    if secure is not None:
        fixed = {"key-advertisement": secure.key_advertisement, "key-sharing": secure.key_sharing,
                 "unmasking": secure.unmasking}
        with np.errstate(divide="ignore"):
            for name, (down_b, up_b) in secure.phase_bytes(accepted).items():
                moved[name] = (down_b, up_b)
                times[name] = (fixed[name] + down_b * 8.0 / (arrays["down_mbps"] * 1e6 * bandwidth)
                               + up_b * 8.0 / (arrays["up_mbps"] * 1e6 * bandwidth))
        unmask_s, unmask_bytes = times["unmasking"], moved["unmasking"][1]
    radio, train_w = arrays["radio_power_w"], arrays["train_power_w"]
    durations = np.stack([times[name] for name in names])
    powers = np.stack([train_w if name == "train" else radio for name in names])
    bytes_down = np.array([moved[name][0] for name in names])
    bytes_up = np.array([moved[name][1] for name in names])
    return names, durations, powers, bytes_down, bytes_up, (unmask_s, unmask_bytes)


def _earliest(candidates: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Index (into CAUSES, less one) and time of each device's earliest interruption."""
    stacked = np.stack(candidates[1:], axis=0)
    first = np.argmin(stacked, axis=0)
    return first, stacked[first, np.arange(stacked.shape[1])]


def resolve_cohort(
    config: Config,
    fleet_arrays: dict[str, np.ndarray],
    device: np.ndarray,
    accept_s: np.ndarray,
    checkin_s: np.ndarray,
    charging: np.ndarray,
    battery_pct: np.ndarray,
    signals: SignalState,
    draws: Draws,
    type_names: tuple[str, ...],
    region_names: tuple[str, ...],
    wait_s: float = 0.0,
) -> Cohort:
    """Resolve every started device's task.

    ``fleet_arrays`` maps trait names to per-device arrays (already indexed by ``device``);
    ``accept_s`` is when each task starts and ``checkin_s`` when each check-in came (a signal
    seen on at check-in may turn off while the device waits to start, and it then drops out
    at once); ``charging`` and ``battery_pct`` are as seen at check-in; ``signals`` holds the
    chains' last looks, from which each device's path is followed, up to ``wait_s`` past the
    task (secure aggregation: a device waits for the close, then answers the unmasking).
    ``draws``: the ``task`` stream (keyed by device and check-in tick; a Generator draws in order).
    """
    work = config.workload
    n = device.size
    dtype_codes, region_codes = fleet_arrays["device_type"], fleet_arrays["region"]
    disruptions = config.disruptions

    bandwidth, compute, crash = (
        disruption_factor(disruptions, kind, accept_s, dtype_codes, region_codes, type_names, region_names)
        for kind in ("network-slowdown", "compute-drift", "crash-surge"))
    names, durations, powers, bytes_down, bytes_up, (unmask_s, unmask_bytes) = _phases(
        config, fleet_arrays, n, bandwidth, compute)
    ends = np.cumsum(durations, axis=0)
    task_s = ends[-1]
    hazard = work.crash_rate / 3600.0 * crash  # crash_rate is per hour
    with np.errstate(divide="ignore"):
        crash_at = np.where(hazard > 0, as_draws(draws).exponential(device, checkin_s, CRASH_LANE) / hazard, np.inf)
    # Nothing of the signals matters after the task (and any wait and unmasking) has certainly ended.
    ends_by = np.minimum(np.minimum(task_s + wait_s + unmask_s, crash_at), work.execution_limit)
    followed = [1 + SIGNALS.index(name) for name in set(work.requires) | {"charging"}]
    paths = signals.paths(device, checkin_s, accept_s + ends_by, draws, followed)
    times, on = _signal_events(paths, signals, device)
    rel = times - accept_s[:, None]
    candidates = [np.full(n, np.inf)] * len(CAUSES)
    candidates[1:1 + len(SIGNALS)] = _signal_losses(work, rel, on)
    points, levels, slopes = battery_path(
        ends, powers, battery_pct, _charging_changes(rel, on, charging), charging,
        fleet_arrays["charge_power_w"], fleet_arrays["battery_wh"],
    )
    candidates[_BATTERY] = battery_crossing(points, levels, slopes, work.min_battery)
    candidates[_EXECUTION_LIMIT] = np.full(n, work.execution_limit)
    candidates[_CRASH] = crash_at
    first, first_at = _earliest(candidates)
    drops = first_at < task_s
    examples, weight = work.local_work(fleet_arrays["samples"])
    return Cohort(
        device=device,
        accept_s=accept_s,
        phases=tuple(PHASES.index(name) for name in names),
        durations=durations,
        powers=powers,
        bytes_down=bytes_down,
        bytes_up=bytes_up,
        examples=examples,
        weight=weight,
        local_s=examples * fleet_arrays["sample_cost_s"] * compute,
        drop_at=np.where(drops, first_at, np.inf),
        cause=np.where(drops, first + 1, 0).astype(np.int8),
        interrupt_at=first_at,
        interrupt_cause=(first + 1).astype(np.int8),
        unmask_s=unmask_s,
        unmask_bytes=unmask_bytes,
        battery_start_pct=battery_pct,
        paths=paths,
        battery_points=points,
        battery_levels=levels,
        battery_slopes=slopes,
    )
