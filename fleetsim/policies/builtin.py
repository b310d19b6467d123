"""The built-in selection policies, each written on the plug-in interface of :mod:`.base`.

| name | idea |
| --- | --- |
| ``first-come`` | accept eligible check-ins in arrival order |
| ``lottery`` | a uniform draw from each held window (ranked: keyed random keys) |
| ``quick-finish`` | the shortest predicted tasks of each held window (ranked: predicted time) |
| ``share-quota`` | arrival order within per-type quotas that lift late in the selection |
| ``rested-first`` | the longest-rested devices of each held window (ranked: last participation) |
"""

from __future__ import annotations

import numpy as np

from .base import Candidates, RoundView, SelectionPolicy

__all__ = ["FirstCome", "Lottery", "QuickFinish", "ShareQuota", "RestedFirst", "BUILTIN_POLICIES"]


class FirstCome(SelectionPolicy):
    """Arrival order: accept each eligible check-in as it comes until the round is full."""

    name = "first-come"
    holds_checkins = False

    def __init__(self, window: float = 30.0):
        self.window_s = float(window)

    def choose(self, candidates: Candidates, round: RoundView, rng: np.random.Generator) -> np.ndarray:
        return np.arange(min(round.needed, len(candidates)))


class Lottery(SelectionPolicy):
    """Uniform random over a short collection window: each window's check-ins are held, then
    ``needed`` of them are drawn without replacement.

    The draw: every device in the window gets a uniform key, keyed by the device and its
    first check-in tick of the window (:meth:`Candidates.keyed`), and the ``needed`` lowest
    keys win. Independent uniform keys make that a uniform draw without replacement, and the
    same check-in gets the same key in every run of the seed. Candidates built by hand (no
    keyed source) draw their keys from ``rng``."""

    name = "lottery"
    holds_checkins = True

    def __init__(self, window: float = 20.0):
        self.window_s = float(window)

    @staticmethod
    def _keys(candidates: Candidates, round: RoundView, rng: np.random.Generator) -> np.ndarray:
        keys = candidates.keyed(since_s=round.now_s)
        return rng.random(len(candidates)) if keys is None else keys

    def rank(self, candidates: Candidates, round: RoundView, rng: np.random.Generator) -> np.ndarray:
        # A uniformly random order: the first `needed` eligible in it are a uniform draw.
        return self._keys(candidates, round, rng)

    def choose(self, candidates: Candidates, round: RoundView, rng: np.random.Generator) -> np.ndarray:
        take = min(round.needed, len(candidates))
        return np.sort(np.argsort(self._keys(candidates, round, rng), kind="stable")[:take])


class QuickFinish(SelectionPolicy):
    """Speed-aware: in each window prefer the devices predicted to finish soonest.

    ``max_predicted``: if set (seconds), check-ins predicted to take longer are refused.
    """

    name = "quick-finish"
    holds_checkins = True

    def __init__(self, window: float = 20.0, max_predicted: float | None = None):
        self.window_s = float(window)
        self.max_predicted = max_predicted

    def rank(self, candidates: Candidates, round: RoundView, rng: np.random.Generator) -> np.ndarray:
        key = candidates.predicted_s.astype(float)
        if self.max_predicted is not None:
            key = np.where(key <= self.max_predicted, key, np.inf)
        return key

    def choose(self, candidates: Candidates, round: RoundView, rng: np.random.Generator) -> np.ndarray:
        order = np.argsort(candidates.predicted_s, kind="stable")
        if self.max_predicted is not None:
            order = order[candidates.predicted_s[order] <= self.max_predicted]
        return order[: round.needed]


class ShareQuota(SelectionPolicy):
    """Per-type quota in proportion to fleet shares, in arrival order.

    Each device type may fill ceil(share * accept_count) places. After ``relax_after`` (a
    fraction of the selection timeout) the quotas lift, so a scarce type cannot stall every
    round.
    """

    name = "share-quota"
    holds_checkins = False

    def __init__(self, window: float = 30.0, relax_after: float = 0.75):
        if not 0.0 <= relax_after <= 1.0:
            raise ValueError(f"relax_after(={relax_after}) must be in [0, 1]")
        self.window_s = float(window)
        self.relax_after = float(relax_after)

    def choose(self, candidates: Candidates, round: RoundView, rng: np.random.Generator) -> np.ndarray:
        relax_at = round.opened_s + self.relax_after * (round.timeout_s - round.opened_s)
        quota = np.ceil(round.type_shares * round.accept_count - 1e-9).astype(np.int64)
        room = np.maximum(quota - round.accepted_by_type, 0)
        # Rank of each check-in among earlier check-ins of its own type.
        types = candidates.device_type.astype(np.int64)
        order = np.argsort(types, kind="stable")
        sorted_types = types[order]
        starts = np.searchsorted(sorted_types, sorted_types, side="left")
        rank = np.empty(types.size, dtype=np.int64)
        rank[order] = np.arange(types.size) - starts
        ok = (rank < room[types]) | (candidates.checkin_s >= relax_at)
        # Lifted quotas only admit check-ins after relax_at; keep arrival order overall.
        return np.flatnonzero(ok)[: round.needed]


class RestedFirst(SelectionPolicy):
    """Longest-rested first: in each window prefer devices whose last participation is
    oldest (never-seen devices first), ties broken by check-in order."""

    name = "rested-first"
    holds_checkins = True

    def __init__(self, window: float = 20.0):
        self.window_s = float(window)

    def rank(self, candidates: Candidates, round: RoundView, rng: np.random.Generator) -> np.ndarray:
        return candidates.last_participation_s

    def choose(self, candidates: Candidates, round: RoundView, rng: np.random.Generator) -> np.ndarray:
        order = np.argsort(candidates.last_participation_s, kind="stable")
        return order[: round.needed]


BUILTIN_POLICIES: dict[str, type[SelectionPolicy]] = {
    cls.name: cls for cls in (FirstCome, Lottery, QuickFinish, ShareQuota, RestedFirst)
}
