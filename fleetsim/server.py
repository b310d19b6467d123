"""One workload's round protocol, a round at a time (opened by :mod:`fleetsim.desk`).

A round opens; it accepts check-ins per the selection policy until
``ceil(target_reports * over_selection)`` are accepted or the selection timeout passes (with
fewer than ``min_reports`` accepted the round ends as ``selection-timeout``); then the report deadline runs.
The round closes at the earlier of ``target_reports`` reports or the deadline and commits
when it holds at least ``min_reports``. At close, devices still downloading or training are
told to stop; a device already uploading finishes and its report is refused as late. The
next round opens after the aggregation time. A server outage loses the round it cuts and
holds the next one until it ends. Every accepted device then rests for ``rest``.

A task starts at acceptance, or (``configure: after-selection``) for the whole cohort when
the selection ends, in which case a round abandoned at selection starts none. With secure
aggregation the devices that reported on time answer the unmasking after the close; with
fewer answers than the threshold the round ends ``unmasking-failed``.

A device is in a round at most once: within a collection window it is one candidate (its
first eligible tick, however often it ticks in the window), from acceptance it is busy until
its participation ends and its rest is over, and the engine refuses a policy's choice that
names a device twice or one the round already holds (FleetsimError).

simpy drives only the desk's openings; each round and its cohort's tasks are resolved in bulk
(:mod:`fleetsim.client`).
"""

from __future__ import annotations

import numpy as np

from .client import Cohort, resolve_cohort
from .config import Config
from .events import PHASES, ROUND_STATUS, EventLog, outcome_codes, round_status, waste_codes
from .pacing import Pacer
from .policies import SelectionPolicy
from .runtime import FleetRuntime
from .selecting import Selector

__all__ = ["RoundServer"]

_STATUS = {name: i for i, name in enumerate(ROUND_STATUS)}
_UPLOAD = PHASES.index("upload")
_UNMASKING = PHASES.index("unmasking")


class RoundServer:
    """One workload's rounds: each opened by :class:`fleetsim.desk.Desk`, run and logged whole."""

    def __init__(
        self,
        config: Config,
        runtime: FleetRuntime,
        policy: SelectionPolicy,
        log: EventLog,
        rngs: dict[str, np.random.Generator],
    ):
        self.config = config
        self.runtime = runtime
        self.policy = policy
        self.log = log
        self.rngs = rngs
        shares = np.array(config.fleet.joint_mix()).sum(axis=1)  # the fleet's type mix, every region's own
        self.type_shares = shares / shares.sum()
        self.outages = sorted(
            (d.start, d.start + d.duration) for d in config.disruptions if d.kind == "server-outage"
        )
        self.round_index = 0
        self.pacer = Pacer(config, runtime) if config.rounds.pacing is not None else None
        self.selector = Selector(config, runtime, policy, rngs, self.type_shares)

    # -------------------------------------------------------------------------- helpers

    def outage_at(self, t: float) -> tuple[float, float] | None:
        """The server outage under way at ``t`` (start, end), or None."""
        for start, end in self.outages:
            if start <= t < end:
                return start, end
        return None

    def next_outage_after(self, t: float) -> float:
        """When the next server outage after ``t`` starts (inf: none)."""
        starts = [start for start, _ in self.outages if start > t]
        return min(starts) if starts else np.inf

    # -------------------------------------------------------------------------- one round

    def open_round(self, opened: float, held_s: float) -> tuple[float, float]:
        """Run one round from ``opened`` (after it was held ``held_s``); log it; return when its
        selection ended and when it ended (its close, or with secure aggregation the end of the
        unmasking)."""
        rounds = self.config.rounds
        secure = rounds.secure_aggregation
        index = self.round_index
        self.round_index += 1
        # An outage cuts the selection short (the round is then lost at the outage start).
        timeout_at = min(opened + rounds.selection_timeout, self.next_outage_after(opened))
        picked = self.selector.select(opened, index, timeout_at)
        if self.pacer is not None:
            self.pacer.met(picked.selected_at - opened, picked.met)
        devices, checkin_s, accept_s = picked.devices, picked.checkin_s, picked.accept_s
        battery, charging = picked.battery, picked.charging
        selected_at, checkins = float(picked.selected_at), int(picked.checkins)
        n = devices.size
        enough = n >= rounds.required_reports
        after = rounds.configure == "after-selection"
        start_s = np.full(n, selected_at) if after else accept_s
        wait_s = rounds.selection_timeout + rounds.report_deadline if secure is not None else 0.0
        cohort = self._resolve(devices, start_s, checkin_s, charging, battery, wait_s)
        # after-selection: a round abandoned at selection (too few accepted, or cut by an
        # outage) starts no task.
        cut = self.next_outage_after(opened) <= selected_at
        started = not after or (enough and not cut)
        report_at = start_s + np.where(np.isinf(cohort.drop_at) & started, cohort.task_s, np.inf)
        closed, lost = self._close_at(opened, selected_at, report_at, enough)

        rel_close = closed - start_s
        on_time = report_at <= closed
        dropped = ~on_time & (cohort.drop_at <= rel_close) & started
        working = ~on_time & ~dropped & started
        # At close a device already uploading finishes (its report is late) or drops out on the way.
        uploading = working & (cohort.phase_at(rel_close) == _UPLOAD) & (not lost)
        late = uploading & np.isinf(cohort.drop_at)
        is_drop = dropped | (uploading & ~late)

        end_rel = np.where(on_time | late, cohort.task_s, np.maximum(rel_close, 0.0) if started else 0.0)
        end_rel = np.where(is_drop, cohort.drop_at, end_rel)
        cause = np.where(is_drop, cohort.cause, 0).astype(np.int8)
        phase = np.where(is_drop, cohort.phase_at(cohort.drop_at), 0).astype(np.int8)
        n_reports = int(on_time.sum())
        ended, responses, unmask_from = float(closed), 0, None
        if secure is not None and on_time.any() and not lost:
            ended, responses, unmask_from, end_rel, cause, phase = self._unmask(
                cohort, on_time, rel_close, end_rel, cause, phase, closed)
        unmasked = secure is None or responses >= secure.needed(n)
        status = round_status(lost, enough, n_reports, rounds.required_reports, unmasked)
        used = on_time & (status == "committed")
        if opened >= 0:  # a warm-up round's participations are dropped from the run (engine._after_warmup)
            self._log_participations(
                index, cohort, end_rel, unmask_from,
                accepted_s=accept_s,
                outcome=outcome_codes(on_time, late, is_drop),
                dropout_cause=cause,
                dropout_phase=phase,
                waste_cause=waste_codes(status, late, is_drop, cause, used),
                used=used,
            )
        self.log.add_round(
            round=index,
            opened_s=opened,
            selected_s=float(selected_at),
            closed_s=float(closed),
            ended_s=ended,
            accepted=n,
            reports=n_reports,
            status=_STATUS[status],
            checkins=int(checkins),
            unmask_responses=responses,
            held_s=held_s,
            stretch=self.runtime.stretch,
        )
        self.runtime.release(cohort, end_rel)
        return selected_at, ended

    def _unmask(
        self, cohort: Cohort, on_time: np.ndarray, rel_close: np.ndarray, end_rel: np.ndarray,
        cause: np.ndarray, phase: np.ndarray, closed: float,
    ) -> tuple[float, int, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Secure aggregation's unmasking after the close: every device whose report arrived on
        time answers within its unmasking time unless interrupted first (it then ends there,
        with its cause and the unmasking phase). Returns the round's end, the answers, when
        each device began the unmasking (inf: it did not), and the updated ends, causes and
        phases. An outage during the unmasking is not modelled (the round is judged at its
        close)."""
        finish = rel_close + cohort.unmask_s
        answered = on_time & (cohort.interrupt_at > finish)
        broken = on_time & ~answered
        end_rel = np.where(answered, finish, end_rel)
        end_rel = np.where(broken, np.maximum(cohort.interrupt_at, cohort.task_s), end_rel)
        cause = np.where(broken, cohort.interrupt_cause, cause).astype(np.int8)
        phase = np.where(broken, _UNMASKING, phase).astype(np.int8)
        unmask_from = np.where(on_time, rel_close, np.inf)
        ended = float(closed + cohort.unmask_s[on_time].max())
        return ended, int(answered.sum()), unmask_from, end_rel, cause, phase

    def _resolve(
        self, devices: np.ndarray, accept_s: np.ndarray, checkin_s: np.ndarray, charging: np.ndarray,
        battery: np.ndarray, wait_s: float,
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
            self.runtime.draws["task"], fleet.type_names, fleet.region_names, wait_s,
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
        outage_start = self.next_outage_after(opened)
        lost = bool(outage_start <= closed)
        return (float(outage_start) if lost else float(closed)), lost

    def _log_participations(
        self, index: int, cohort: Cohort, end_rel: np.ndarray, unmask_from: np.ndarray | None, **columns: np.ndarray,
    ) -> None:
        """Append the round's participations to the log (``columns``: accepted_s, outcome,
        cause, phase, waste_cause, used); work done is counted up to each participation's end."""
        fleet = self.runtime.fleet
        devices, start_s = cohort.device, cohort.accept_s
        compute_s, download_bytes, upload_bytes, energy_wh, examples = cohort.work_until(end_rel, unmask_from)
        self.log.add_participations(
            round=np.full(devices.size, index),
            device=devices,
            device_type=fleet.device_type[devices],
            region=fleet.region[devices],
            started_s=start_s,
            ended_s=start_s + end_rel,
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
            examples_processed=examples,
            weight=cohort.weight,
            **columns,
        )
