"""The server's round protocol as simpy processes.

A round opens; it accepts check-ins per the selection policy until
``ceil(target_reports * over_selection)`` are accepted or the selection timeout passes (with
fewer than ``min_reports`` accepted the round ends as ``selection-timeout``); then the report deadline runs.
The round closes at the earlier of ``target_reports`` reports or the deadline and commits
when it holds at least ``min_reports``. At close, devices still downloading or training are
told to stop; a device already uploading finishes and its report is refused as late. The
next round opens after the aggregation time. A server outage loses the round it cuts and
holds the next one until it ends. Every accepted device then rests for ``rest``.

A device is in a round at most once: within a collection window it is one candidate (its
first eligible tick, however often it ticks in the window), from acceptance it is busy until
its participation ends and its rest is over, and the engine refuses a policy's choice that
names a device twice or one the round already holds (FleetsimError).

simpy drives only these server-side events; each cohort's tasks are resolved in bulk
(:mod:`fleetsim.client`).
"""

from __future__ import annotations

from collections.abc import Callable, Generator
from typing import Any

import numpy as np
import simpy

from .client import Cohort, resolve_cohort
from .config import Config
from .errors import FleetsimError
from .events import ROUND_STATUS, EventLog, outcome_codes, round_status, waste_codes
from .policies import Candidates, RoundView, SelectionPolicy
from .runtime import FleetRuntime

__all__ = ["RoundServer"]

_STATUS = {name: i for i, name in enumerate(ROUND_STATUS)}
_UPLOAD = 3  # phase code of the upload (events.PHASES)


class RoundServer:
    """Runs rounds back to back from the horizon start until it ends."""

    def __init__(
        self,
        env: simpy.Environment,
        config: Config,
        runtime: FleetRuntime,
        policy: SelectionPolicy,
        log: EventLog,
        rngs: dict[str, np.random.Generator],
        horizon_s: float,
        on_progress: Callable[[float], None] | None = None,
    ):
        self.env = env
        self.config = config
        self.runtime = runtime
        self.policy = policy
        self.log = log
        self.rngs = rngs
        self.horizon_s = horizon_s
        self.on_progress = on_progress
        shares = np.array(config.fleet.joint_mix()).sum(axis=1)  # the fleet's type mix, every region's own
        self.type_shares = shares / shares.sum()
        self.outages = sorted(
            (d.start, d.start + d.duration) for d in config.disruptions if d.kind == "server-outage"
        )
        self.round_index = 0
        self._rate: float | None = None  # eligible check-ins per second seen lately (sizes arrival windows)
        self._eligible_share = 0.1  # share of free ticks found eligible lately (sizes ranked batches)

    # -------------------------------------------------------------------------- helpers

    def _outage_at(self, t: float) -> tuple[float, float] | None:
        for start, end in self.outages:
            if start <= t < end:
                return start, end
        return None

    def _next_outage_after(self, t: float) -> float:
        starts = [start for start, _ in self.outages if start > t]
        return min(starts) if starts else np.inf

    def run(self) -> Generator[Any, Any, None]:
        """The server process: open rounds until the horizon ends."""
        env = self.env
        while env.now < self.horizon_s:
            outage = self._outage_at(env.now)
            if outage is not None:
                yield env.timeout(outage[1] - env.now)
                continue
            closed = self._round(env.now)
            yield env.timeout(max(closed - env.now, 0.0))
            if self.on_progress is not None:
                self.on_progress(max(env.now, 0.0))
            yield env.timeout(self.config.rounds.aggregation_time)

    # -------------------------------------------------------------------------- one round

    def _select(self, opened: float, index: int) -> tuple[Any, ...]:
        """Fill round ``index``: accepted devices, check-in and acceptance times, battery %,
        charging; the selection's end; the eligible check-ins seen from ``opened`` to the
        selection's end (one per device and window; a ranking policy's windows look only at
        as many as it can use).

        Raises FleetsimError naming the policy, the round and the time if the policy's choice
        is out of range, names a device twice, or names one the round already holds.
        """
        rounds = self.config.rounds
        runtime, policy = self.runtime, self.policy
        rng = self.rngs["policy"]
        n_types = len(runtime.fleet.type_names)
        accept_count = rounds.accept_count
        # An outage cuts the selection short (the round is then lost at the outage start).
        timeout_at = min(opened + rounds.selection_timeout, self._next_outage_after(opened))
        needed = accept_count
        by_type = np.zeros(n_types, dtype=np.int64)
        chunks: list[tuple[np.ndarray, ...]] = []
        t = opened
        checkins = 0
        selected_at = timeout_at
        in_round = np.zeros(runtime.fleet.size, dtype=bool)
        while needed > 0 and t < timeout_at:
            length = policy.window_s
            if not policy.holds_checkins and self._rate:
                # Causal policies: a window long enough for the needed check-ins, no longer.
                length = min(length, max(1.0, 2.0 * needed / self._rate))
            end = min(t + length, timeout_at)
            view = RoundView(
                round_index=index,
                opened_s=opened,
                now_s=t,
                timeout_s=timeout_at,
                accept_count=accept_count,
                needed=needed,
                accepted_by_type=by_type.copy(),
                type_shares=self.type_shares,
            )
            devices, times, battery, charging = self._window(t, end, view, rng)
            checkins += devices.size
            if end > t and devices.size:
                self._rate = max(devices.size / (end - t), 1e-3)
            if devices.size == 0:
                t = end
                continue
            candidates = self._candidates(devices, times, battery, charging)
            chosen = np.asarray(policy.choose(candidates, view, rng), dtype=np.int64)
            self._check_choice(chosen, devices, needed, in_round, index, t)
            if chosen.size:
                chosen.sort()
                at = times[chosen] if not policy.holds_checkins else np.full(chosen.size, end)
                chunks.append((devices[chosen], times[chosen], at, battery[chosen], charging[chosen]))
                runtime.accept(devices[chosen])
                in_round[devices[chosen]] = True
                np.add.at(by_type, runtime.fleet.device_type[devices[chosen]], 1)
                needed -= chosen.size
                if needed == 0:
                    selected_at = float(at.max())
                    # A causal policy's window may run past the selection's end: those check-ins
                    # came after the round was full and are not the selection's.
                    checkins -= int((times > selected_at).sum())
            t = end
        if not chunks:
            empty = np.empty(0)
            return empty.astype(np.int64), empty, empty, empty, empty.astype(bool), timeout_at, checkins
        devices, checkin, at, battery, charging = (np.concatenate(parts) for parts in zip(*chunks, strict=True))
        return devices, checkin, at, battery, charging, selected_at, checkins

    def _candidates(
        self, devices: np.ndarray, times: np.ndarray, battery: np.ndarray, charging: np.ndarray
    ) -> Candidates:
        """The check-ins as a policy sees them (per-device traits gathered on demand)."""
        fleet = self.runtime.fleet
        return Candidates(devices, times, battery, charging, self.runtime.traits(), fleet.type_names,
                          fleet.region_names)

    def _check_choice(
        self, chosen: np.ndarray, devices: np.ndarray, needed: int, in_round: np.ndarray, index: int, t: float
    ) -> None:
        """Raise FleetsimError unless ``chosen`` names at most ``needed`` positions in range, and
        distinct devices the round does not already hold (a device is in a round at most once)."""
        name = type(self.policy).__name__
        where = f"in round {index} at t={t:.3f} s"
        if chosen.size > needed or (chosen.size and (chosen.min() < 0 or chosen.max() >= devices.size)):
            raise FleetsimError(
                f"selection policy {name} returned invalid positions {where} "
                f"(need at most {needed} distinct positions in 0..{devices.size - 1})"
            )
        picked = devices[chosen]
        unique, counts = np.unique(picked, return_counts=True)
        twice = unique[counts > 1]
        held = picked[in_round[picked]]
        if twice.size or held.size:
            device = int(twice[0]) if twice.size else int(held[0])
            what = "twice" if twice.size else "already accepted in this round"
            raise FleetsimError(
                f"selection policy {name} returned invalid positions {where}: device {device} {what} "
                f"(a device is in a round at most once)"
            )

    def _window(
        self, start: float, end: float, view: RoundView, rng: np.random.Generator
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """The eligible check-ins of one collection window, in check-in order.

        A policy that ranks check-ins before eligibility is known (``rank``) gets only as many
        as it can use: ticks are looked at in rank order until enough are eligible. The policy
        then chooses among a set that holds its top choices, which gives the same outcome as
        showing it every eligible check-in, at a cost that does not grow with the fleet.
        """
        runtime = self.runtime
        devices, times = runtime.free_ticks(start, end)
        key = None
        # A window longer than the check-in period holds several ticks of a device; it is ranked
        # once (at its first tick) and its ticks are looked at together (runtime.eligible).
        repeats = end - start > runtime.checkin_every
        first = np.unique(devices, return_index=True)[1] if repeats else np.arange(devices.size)
        first.sort()
        if devices.size:
            d0, t0 = devices[first], times[first]
            blank = self._candidates(d0, t0, np.full(d0.size, np.nan), np.zeros(d0.size, bool))
            key = self.policy.rank(blank, view, rng)  # None: no ranking (SelectionPolicy.rank)
        if key is None:
            live, battery, charging = runtime.eligible(devices, times)
            return devices[live], times[live], battery, charging
        key = np.asarray(key, dtype=float)
        if key.shape != (first.size,) or np.isnan(key).any():
            raise FleetsimError(
                f"selection policy {type(self.policy).__name__}.rank returned keys of shape {key.shape}"
                f"{' with NaN' if key.shape == (first.size,) else ''} in round {view.round_index} at t={start:.3f} s "
                f"(need one number per candidate, {first.size}; +inf: never chosen)"
            )
        remaining = np.flatnonzero(key < np.inf)  # +inf: never chosen (-inf ranks first)
        found: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []
        count = 0
        while remaining.size and count < view.needed:
            size = max(64, int(2.0 * (view.needed - count) / self._eligible_share))
            if size < remaining.size:
                # The `size` lowest keys (ties by check-in order), without sorting the rest.
                part = np.argpartition(key[remaining], size - 1)
                top = remaining[part[:size]]
                cut = key[remaining[part[size - 1]]]
                tied = remaining[part[size:]][key[remaining[part[size:]]] == cut]
                if tied.size:  # keep tie order stable: the earliest check-ins of the cut key
                    low = top[key[top] < cut]
                    at_cut = np.sort(np.concatenate([top[key[top] == cut], tied]))
                    top = np.concatenate([low, at_cut[: size - low.size]])
                batch = np.sort(top)
                remaining = np.setdiff1d(remaining, batch, assume_unique=True)
            else:
                batch, remaining = remaining, remaining[:0]
            ticks = first[batch] if not repeats else np.flatnonzero(np.isin(devices, devices[first[batch]]))
            live, battery, charging = runtime.eligible(devices[ticks], times[ticks])
            self._eligible_share = min(1.0, max(live.size / batch.size, 0.01))
            found.append((ticks[live], battery, charging))
            count += live.size
        if not found:
            empty = np.empty(0)
            return empty.astype(np.int64), empty, empty, empty.astype(bool)
        positions, battery, charging = (np.concatenate(parts) for parts in zip(*found, strict=True))
        in_time = np.argsort(positions, kind="stable")
        positions = positions[in_time]
        return devices[positions], times[positions], battery[in_time], charging[in_time]

    def _round(self, opened: float) -> float:
        """Run one round from ``opened``; log it; return its close time."""
        rounds = self.config.rounds
        index = self.round_index
        self.round_index += 1
        devices, checkin_s, accept_s, battery, charging, selected_at, checkins = self._select(opened, index)
        selected_at, checkins = float(selected_at), int(checkins)
        n = devices.size
        enough = n >= rounds.required_reports
        cohort = self._resolve(devices, accept_s, checkin_s, charging, battery)
        report_at = accept_s + np.where(np.isinf(cohort.drop_at), cohort.task_s, np.inf)
        closed, lost = self._close_at(opened, selected_at, report_at, enough)

        rel_close = closed - accept_s
        on_time = report_at <= closed
        dropped = ~on_time & (cohort.drop_at <= rel_close)
        working = ~on_time & ~dropped
        # At close a device already uploading finishes (its report is late) or drops out on the way.
        uploading = working & (cohort.phase_at(rel_close) == _UPLOAD) & (not lost)
        late = uploading & np.isinf(cohort.drop_at)
        is_drop = dropped | (uploading & ~late)

        end_rel = np.where(on_time | late, cohort.task_s, rel_close)
        end_rel = np.where(is_drop, cohort.drop_at, end_rel)
        cause = np.where(is_drop, cohort.cause, 0).astype(np.int8)
        n_reports = int(on_time.sum())
        status = round_status(lost, enough, n_reports, rounds.required_reports)
        used = on_time & (status == "committed")
        self._log_participations(
            index, cohort, end_rel,
            outcome=outcome_codes(on_time, late, is_drop),
            dropout_cause=cause,
            dropout_phase=np.where(is_drop, cohort.phase_at(cohort.drop_at), 0).astype(np.int8),
            waste_cause=waste_codes(status, late, is_drop, cause, used),
            used=used,
        )
        self.log.add_round(
            round=index,
            opened_s=opened,
            selected_s=float(selected_at),
            closed_s=float(closed),
            accepted=n,
            reports=n_reports,
            status=_STATUS[status],
            checkins=int(checkins),
        )
        self.runtime.release(cohort, end_rel)
        return float(closed)

    def _resolve(
        self, devices: np.ndarray, accept_s: np.ndarray, checkin_s: np.ndarray, charging: np.ndarray,
        battery: np.ndarray,
    ) -> Cohort:
        """The accepted devices' tasks, resolved from their traits (:func:`fleetsim.client.resolve_cohort`)."""
        fleet = self.runtime.fleet
        arrays = {
            "device_type": fleet.device_type[devices],
            "region": fleet.region[devices],
            "down_mbps": fleet.down_mbps[devices],
            "up_mbps": fleet.up_mbps[devices],
            "samples": fleet.samples[devices],
            "sample_cost_s": fleet.sample_cost_s[devices],
            "radio_power_w": fleet.radio_power_w[devices],
            "train_power_w": fleet.train_power_w[devices],
            "charge_power_w": fleet.charge_power_w[devices],
            "battery_wh": fleet.battery_wh[devices],
        }
        return resolve_cohort(
            self.config, arrays, devices, accept_s, checkin_s, charging, battery, self.runtime.signals,
            self.rngs["task"], fleet.type_names, fleet.region_names,
        )

    def _close_at(self, opened: float, selected_at: float, report_at: np.ndarray, enough: bool) -> tuple[float, bool]:
        """When the round closes (s) and whether an outage cut it: at ``target_reports`` reports
        or the report deadline, whichever is first (at the selection's end when too few devices
        were accepted), or at the start of an outage before that."""
        rounds = self.config.rounds
        if enough:
            deadline_at = selected_at + rounds.report_deadline
            k = rounds.target_reports
            kth = np.partition(report_at, k - 1)[k - 1] if report_at.size >= k else np.inf
            closed = max(min(deadline_at, kth), selected_at)
        else:
            closed = selected_at  # ended by the selection timeout
        outage_start = self._next_outage_after(opened)
        lost = bool(outage_start <= closed)
        return (float(outage_start) if lost else float(closed)), lost

    def _log_participations(self, index: int, cohort: Cohort, end_rel: np.ndarray, **columns: np.ndarray) -> None:
        """Append the round's participations to the log (``columns``: outcome, cause, phase,
        waste_cause, used); work done is counted up to each participation's end."""
        fleet = self.runtime.fleet
        devices, accept_s = cohort.device, cohort.accept_s
        compute_s, download_bytes, upload_bytes, energy_wh = cohort.work_until(end_rel)
        self.log.add_participations(
            round=np.full(devices.size, index),
            device=devices,
            device_type=fleet.device_type[devices],
            region=fleet.region[devices],
            accepted_s=accept_s,
            ended_s=accept_s + end_rel,
            download_s=cohort.download_s,
            train_s=cohort.train_s,
            upload_s=cohort.upload_s,
            compute_s=compute_s,
            download_bytes=download_bytes,
            upload_bytes=upload_bytes,
            energy_wh=energy_wh,
            battery_start_pct=cohort.battery_start_pct,
            battery_used_pct=100.0 * energy_wh / fleet.battery_wh[devices],
            samples=fleet.samples[devices],
            **columns,
        )
