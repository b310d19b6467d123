"""The server's selection desk: when each workload's next round opens.

The server selects for one round at a time: every check-in that arrives during a selection
is that round's to accept or turn away. A workload's next round may open once its previous
round's selection has ended and fewer than its ``in_flight`` rounds are open (a round holds
its slot until it ends and its aggregation time has passed). When several workloads are
ready at once, ``sharing.rule`` says which opens first:

- ``priority``: the first in the order of ``workloads``;
- ``shares``: the one whose selections have held the desk least, relative to its share
  (desk time / share, ties by order): over a long run each workload holds the desk in
  proportion to its share whenever they all want it, and a workload that wants less
  leaves its time to the others (a work-conserving weighted fair share).

With pacing (:mod:`fleetsim.pacing`) a ready workload whose round is predicted not to fill
is held and the next in order may open instead; while every ready workload is held, each
looks at the check-ins of its next ``recheck``. A server outage opens nothing; a hold it
cuts is not counted. A device is in at most one round at a time, of any workload: busy and
rest times are the fleet's (:meth:`fleetsim.runtime.FleetRuntime.for_workload`).
"""

from __future__ import annotations

from collections.abc import Callable, Generator, Sequence
from typing import Any

import simpy

from .server import RoundServer

__all__ = ["Desk"]


class Desk:
    """Opens the rounds of one or more workloads, one selection at a time, until the horizon."""

    def __init__(
        self,
        env: simpy.Environment,
        servers: Sequence[RoundServer],
        rule: str,
        shares: Sequence[float],
        horizon_s: float,
        on_progress: Callable[[float], None] | None = None,
    ):
        self.env = env
        self.servers = list(servers)
        self.rule = rule
        self.shares = [float(share) for share in shares]
        self.horizon_s = horizon_s
        self.on_progress = on_progress
        n = len(self.servers)
        self.slots: list[list[float]] = [[] for _ in range(n)]  # when each open round frees its slot
        self.ready_at = [float("-inf")] * n  # when each workload may next open a round
        self.held = [0.0] * n  # each workload's hold so far (pacing)
        self.desk_s = [0.0] * n  # selection time each workload has held the desk

    def _order(self, ready: list[int]) -> list[int]:
        """Ready workloads in the order they may open (``sharing.rule``)."""
        if self.rule == "shares":
            return sorted(ready, key=lambda w: (self.desk_s[w] / self.shares[w], w))
        return ready

    def run(self) -> Generator[Any, Any, None]:
        """The server process: open rounds until the horizon ends."""
        env, first = self.env, self.servers[0]
        while env.now < self.horizon_s:
            outage = first.outage_at(env.now)
            if outage is not None:
                self.held = [0.0] * len(self.servers)  # a hold an outage cuts is not counted
                yield env.timeout(outage[1] - env.now)
                continue
            ready = [w for w, at in enumerate(self.ready_at) if at <= env.now]
            if not ready:
                yield env.timeout(min(self.ready_at) - env.now)
                continue
            chosen = next((w for w in self._order(ready) if self._fills(w)), None)
            if chosen is None:
                yield env.timeout(self._hold(ready))
                continue
            selected_at = self._open(chosen)
            yield env.timeout(max(selected_at, env.now) - env.now)
            if self.on_progress is not None:
                self.on_progress(max(env.now, 0.0))

    def _fills(self, w: int) -> bool:
        """Whether workload ``w``'s round would open now (always, without pacing)."""
        pacer = self.servers[w].pacer
        return pacer is None or pacer.ready()

    def _hold(self, ready: list[int]) -> float:
        """Every ready workload is held: each looks at its next recheck's check-ins (turning
        them away). Returns the step, s: the shortest recheck, cut at the next outage and at
        the time another workload becomes ready."""
        now = self.env.now
        pacers = [self.servers[w].pacer for w in ready]
        step = min(pacer.recheck for pacer in pacers if pacer is not None)
        step = min(step, self.servers[0].next_outage_after(now) - now)
        waiting = [at for at in self.ready_at if at > now]
        if waiting:
            step = min(step, min(waiting) - now)
        for w, pacer in zip(ready, pacers, strict=True):
            assert pacer is not None
            pacer.look(now, now + step)
            self.held[w] += step
        return step

    def _open(self, w: int) -> float:
        """Open workload ``w``'s round now; book its slot and when it may open the next.
        Returns when its selection ended (the desk is free again)."""
        server, now = self.servers[w], self.env.now
        if server.pacer is not None:
            server.pacer.set_stretch()
        selected_at, ended = server.open_round(now, self.held[w])
        self.held[w] = 0.0
        self.desk_s[w] += max(selected_at - now, 0.0)
        rounds = server.config.rounds
        slots = [b for b in self.slots[w] if b > selected_at] + [ended + rounds.aggregation_time]
        next_open = max(selected_at, now)
        while sum(b > next_open for b in slots) >= rounds.in_flight:
            next_open = min(b for b in slots if b > next_open)
        self.slots[w] = slots
        self.ready_at[w] = next_open
        return selected_at
