"""How a round fills: collection windows of check-ins shown to the selection policy.

A round accepts check-ins per the selection policy until ``ceil(target_reports *
over_selection)`` are accepted or the selection ends. Within a collection window a device is
one candidate (its first eligible tick); a policy that ranks check-ins is shown only as many
as it can use (:meth:`Selector._window`). The engine refuses a policy's
choice that names a device twice or one the round already holds (FleetsimError).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .config import Config
from .errors import FleetsimError
from .policies import Candidates, RoundView, SelectionPolicy
from .runtime import FleetRuntime

__all__ = ["Picked", "Selector"]


@dataclass
class Picked:
    """What a selection gathered: the accepted devices with their check-in and acceptance
    times, battery % and charging seen at check-in; the selection's end; the eligible
    check-ins it counted (a ranking policy's windows look only at as many as it can use); and
    the eligible check-ins it met up to the selection's end, estimated where a ranking
    policy's window was not looked at whole."""

    devices: np.ndarray
    checkin_s: np.ndarray
    accept_s: np.ndarray
    battery: np.ndarray
    charging: np.ndarray
    selected_at: float
    checkins: int
    met: float


class Selector:
    """Fills rounds from the fleet's check-ins; keeps the arrival rate it saw lately."""

    def __init__(self, config: Config, runtime: FleetRuntime, policy: SelectionPolicy,
                 rngs: dict[str, np.random.Generator], type_shares: np.ndarray):
        self.config = config
        self.runtime = runtime
        self.policy = policy
        self.rngs = rngs
        self.type_shares = type_shares
        self._rate: float | None = None  # eligible check-ins per second seen lately (sizes arrival windows)
        self._eligible_share = 0.1  # share of free ticks found eligible lately (sizes ranked batches)

    def select(self, opened: float, index: int, timeout_at: float) -> Picked:
        """Fill round ``index`` from ``opened`` until it is full or ``timeout_at`` (the
        selection timeout, or an outage's start, whichever is first): :class:`Picked`.

        Raises FleetsimError naming the policy, the round and the time if the policy's choice
        is out of range, names a device twice, or names one the round already holds.
        """
        rounds = self.config.rounds
        runtime, policy = self.runtime, self.policy
        rng = self.rngs["policy"]
        n_types = len(runtime.fleet.type_names)
        accept_count = rounds.accept_count
        needed = accept_count
        by_type = np.zeros(n_types, dtype=np.int64)
        chunks: list[tuple[np.ndarray, ...]] = []
        t = opened
        checkins = 0
        selected_at = timeout_at
        in_round = np.zeros(runtime.fleet.size, dtype=bool)
        self._met = 0.0
        checkins_after = 0
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
                    checkins_after = int((times > selected_at).sum())
                    checkins -= checkins_after
            t = end
        met = self._met - checkins_after
        if not chunks:
            empty = np.empty(0)
            return Picked(empty.astype(np.int64), empty, empty, empty, empty.astype(bool), timeout_at, checkins, met)
        devices, checkin, at, battery, charging = (np.concatenate(parts) for parts in zip(*chunks, strict=True))
        return Picked(devices, checkin, at, battery, charging, selected_at, checkins, met)

    def _candidates(
        self, devices: np.ndarray, times: np.ndarray, battery: np.ndarray, charging: np.ndarray
    ) -> Candidates:
        """The check-ins as a policy sees them (per-device traits gathered on demand)."""
        fleet = self.runtime.fleet
        return Candidates(devices, times, battery, charging, self.runtime.traits(), fleet.type_names,
                          fleet.region_names, self.runtime.draws.get("policy"))

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
        ranked = np.sort(picked)
        if not (ranked[1:] == ranked[:-1]).any() and not in_round[picked].any():
            return  # the common case, checked without counting
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
            self._met += live.size
            return devices[live], times[live], battery, charging
        key = np.asarray(key, dtype=float)
        if key.shape != (first.size,) or np.isnan(key).any():
            raise FleetsimError(
                f"selection policy {type(self.policy).__name__}.rank returned keys of shape {key.shape}"
                f"{' with NaN' if key.shape == (first.size,) else ''} in round {view.round_index} at t={start:.3f} s "
                f"(need one number per candidate, {first.size}; +inf: never chosen)"
            )
        remaining = np.flatnonzero(key < np.inf)  # +inf: never chosen (-inf ranks first)
        looked = 0
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
            looked += batch.size
            found.append((ticks[live], battery, charging))
            count += live.size
        # The candidates not looked at would have checked in at the share found eligible.
        self._met += sum(part[0].size for part in found) + (first.size - looked) * self._eligible_share
        if not found:
            empty = np.empty(0)
            return empty.astype(np.int64), empty, empty, empty.astype(bool)
        positions, battery, charging = (np.concatenate(parts) for parts in zip(*found, strict=True))
        in_time = np.argsort(positions, kind="stable")
        positions = positions[in_time]
        return devices[positions], times[positions], battery[in_time], charging[in_time]

