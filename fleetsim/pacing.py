"""Server-side pacing: turned-away devices told to stay away, rounds held until they can fill.

Without pacing, a device the server does not accept checks in again at its next tick, so the
server meets every eligible, free device once per check-in period however few it needs.
With ``rounds.pacing`` the server answers a check-in it does not need with the number of
check-in periods to stay away, the *stretch* m: a device then checks in only at every m-th
of its ticks, at ticks k with (k + offset) % m == 0, its offset drawn once, uniformly, so
that the fleet's check-ins stay spread evenly over time. Before each round the server sets
m from the eligible check-ins per second it met in the last selection, r (at stretch m'):
the rate it would meet unpaced is about r x m', and it asks for ``rate`` = margin x the
check-ins a round accepts / the planned fill time, so m = floor(r x m' / rate), at least 1
and at most ``max_wait`` / the check-in period (and ``min_wait`` sets the least m above 1).

It holds a round that is predicted not to fill: if r x the selection timeout falls short of
margin x ``min_reports``, it looks at the check-ins of the next ``recheck`` (turning them
away) and opens once their rate clears the bar, the hold's length recorded in ``held_s``.
The rate r is the one met over the last ``lookback`` of selection (or hold) time.

The load is not counted check-in by check-in (that would cost a look at every tick of every
free device): every eligible, free device checks in once per m check-in periods, so check-ins
per second are the census's eligible estimate / (m x ``checkin_every``), in both modes
(docs/metrics.md, ``server_load``); the rounds table keeps m in ``stretch``.
"""

from __future__ import annotations

import math

from .config import Config
from .runtime import FleetRuntime

__all__ = ["Pacer"]


class Pacer:
    """Sets the stretch from the check-in rate the server meets and decides when to open."""

    def __init__(self, config: Config, runtime: FleetRuntime):
        rounds = config.rounds
        pacing = rounds.pacing
        assert pacing is not None
        self.runtime = runtime
        self.rate = pacing.return_rate(rounds.accept_count, rounds.selection_timeout)
        period = rounds.checkin_every
        min_wait = pacing.min_wait if pacing.min_wait is not None else period
        self.fewest = max(1, math.ceil(min_wait / period - 1e-9))
        self.most = max(1, math.floor(pacing.max_wait / period + 1e-9))
        self.lookback = pacing.lookback
        self.recheck = pacing.recheck
        self.needed = pacing.margin * rounds.required_reports
        self.timeout = rounds.selection_timeout
        self._seen: list[tuple[float, float, int]] = []  # (span s, check-ins, stretch) of recent looks

    # ------------------------------------------------------------------ what the server met

    def met(self, span_s: float, checkins: float) -> None:
        """The server looked at check-ins for ``span_s`` (a selection or a hold) and met
        ``checkins`` eligible ones, at the current stretch."""
        if span_s <= 0:
            return
        self._seen.append((span_s, checkins, self.runtime.stretch))
        total = 0.0
        for i in range(len(self._seen) - 1, -1, -1):  # keep the looks within the lookback
            total += self._seen[i][0]
            if total >= self.lookback:
                self._seen = self._seen[i:]
                break

    def _unpaced_rate(self) -> float:
        """Eligible check-ins per second met lately, scaled by the stretch each was met at: the
        rate an unpaced server would meet."""
        span = sum(s for s, _, _ in self._seen)
        return sum(c * m for _, c, m in self._seen) / span if span > 0 else 0.0

    # ------------------------------------------------------------------ decisions

    def set_stretch(self) -> int:
        """Set and return the stretch for the next round from the unpaced rate met lately."""
        unpaced = self._unpaced_rate()
        stretch = math.floor(unpaced / self.rate) if unpaced > 0 else 1
        stretch = 1 if stretch < max(self.fewest, 2) else min(stretch, self.most)
        self.runtime.stretch = stretch
        return stretch

    def ready(self) -> bool:
        """Whether a round opened now is predicted to fill: the rate met lately (at the
        stretch it will run with) times the selection timeout reaches margin x min_reports.
        With no look yet, a round opens."""
        if not self._seen:
            return True
        return self._unpaced_rate() / self.runtime.stretch * self.timeout >= self.needed

    def look(self, start: float, end: float) -> None:
        """Hold: meet the check-ins in [start, end) (all turned away) and note their rate."""
        runtime = self.runtime
        devices, times = runtime.free_ticks(start, end)
        live, _, _ = runtime.eligible(devices, times) if devices.size else (devices, None, None)
        self.met(end - start, int(live.size))
