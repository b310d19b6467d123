"""Each device's chains as the run has seen them: last looks, and exact paths during tasks.

:class:`SignalState` keeps, per device and chain (:data:`fleetsim.signals.CHAINS`), the last
time the run looked and the on-probability then (0/1 once seen); :meth:`SignalState.paths`
follows chains exactly through a task (:meth:`fleetsim.signals.SignalTables.next_flip`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .signals import CHAINS, SETTLED, SignalTables

__all__ = ["SignalState", "Paths"]


@dataclass
class Paths:
    """Chain paths of some devices from ``t0``: ``state0`` [C, n] (bool) at ``t0`` and
    ``flips`` [C, n, F], the times each chain changed state, ascending, inf-padded.

    Followed to each device's ``t_stop``: nothing is known of a chain after it.
    """

    t0: np.ndarray
    state0: np.ndarray
    flips: np.ndarray
    t_stop: np.ndarray
    followed: np.ndarray  # [C] bool: which chains the paths follow

    def state_at(self, t: np.ndarray) -> np.ndarray:
        """[C, n] state of each chain at times ``t`` (s, one per device, at most ``t_stop``)."""
        odd = (self.flips <= t[None, :, None]).sum(axis=2) % 2 == 1
        return self.state0 ^ odd


class SignalState:
    """Per-device, per-chain last look: time and on-probability then (0/1 once seen).

    Observations must move forward in time per device and chain; :meth:`observe` samples
    the states at later times and records them, :meth:`probability` gives the on-probability
    without drawing or recording (for measurements that must not disturb the run).
    """

    def __init__(self, tables: SignalTables, group: np.ndarray):
        n = group.size
        self.tables = tables
        self.group = np.asarray(group, dtype=np.int64)  # as the tables' line arithmetic takes it (no cast per look)
        self.t_last = np.full((len(CHAINS), n), tables.origin_s)
        # At the grid origin each chain starts from the step's on-probability.
        self.q_last = np.empty((len(CHAINS), n))
        for c in range(len(CHAINS)):
            self.q_last[c] = tables.p[group, c, 0]

    def _probability(self, devices: np.ndarray, chain: int, t: np.ndarray) -> np.ndarray:
        t_from = self.t_last[chain][devices]  # a row, then a 1-D gather: cheaper than a 2-D one
        # A look back in time (a measurement behind the run) reuses the last state.
        t_eval = np.maximum(t, t_from)
        return self.tables.on_probability(self.group[devices], chain, t_from, self.q_last[chain][devices], t_eval)

    def observe(self, devices: np.ndarray, chain: int, t: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        """Sample whether ``chain`` is on for ``devices`` at times ``t``; record it."""
        on = rng.random(devices.size) < self._probability(devices, chain, t)
        self.t_last[chain][devices] = t
        self.q_last[chain][devices] = on
        return on

    def _probabilities(self, devices: np.ndarray, chains: list[int], t: np.ndarray) -> np.ndarray:
        """[len(chains), n] on-probabilities at ``t`` of several chains, in one pass."""
        m, n = len(chains), devices.size
        # Chain by chain: row gathers laid end to end (the same values as a 2-D gather, cheaper).
        t_from = np.concatenate([self.t_last[c][devices] for c in chains])
        q_from = np.concatenate([self.q_last[c][devices] for c in chains])
        t_eval = np.maximum(np.tile(t, m), t_from)
        group = np.tile(self.group[devices], m)
        chain = np.repeat(np.asarray(chains, dtype=np.int64), n)
        q = self.tables.on_probability(group, chain, t_from, q_from, t_eval)
        return q.reshape(m, n)

    def observe_chains(self, devices: np.ndarray, chains: list[int], t: np.ndarray,
                       rng: np.random.Generator) -> np.ndarray:
        """Sample several chains of ``devices`` at times ``t`` at once, [len(chains), n]; record them."""
        if not chains:
            return np.zeros((0, devices.size), dtype=bool)
        on = rng.random((len(chains), devices.size)) < self._probabilities(devices, chains, t)
        for i, c in enumerate(chains):
            self.t_last[c][devices] = t
            self.q_last[c][devices] = on[i]
        return on

    def probabilities(self, devices: np.ndarray, chains: list[int], t: np.ndarray) -> np.ndarray:
        """[len(chains), n] on-probabilities at ``t`` given what the run has seen (nothing recorded)."""
        return self._probabilities(devices, chains, t)

    def probability(self, devices: np.ndarray, chain: int, t: np.ndarray) -> np.ndarray:
        """On-probability of ``chain`` at ``t`` given what the run has seen (nothing recorded)."""
        return self._probability(devices, chain, t)

    def record(self, devices: np.ndarray, chain: int, t: np.ndarray, on: np.ndarray) -> None:
        """Record known states (e.g. a chain's state when a task ended)."""
        self.t_last[chain][devices] = t
        self.q_last[chain][devices] = on

    def signals_on(self, devices: np.ndarray, chains: np.ndarray) -> np.ndarray:
        """[S, n] whether each signal is on, from the chains' states [C, n]."""
        covers = self.tables.covers[self.group[devices]].T  # [S, n]
        return chains[1:] | (chains[SETTLED][None, :] & covers)

    def paths(self, devices: np.ndarray, t0: np.ndarray, t_stop: np.ndarray, rng: np.random.Generator,
              own: list[int] | None = None) -> Paths:
        """The chains' exact paths for ``devices`` from ``t0`` to ``t_stop`` (s): the settled
        chain (when the fleet has one) and the own chains in ``own`` (default: all).

        The states at ``t0`` are drawn given the last looks (exactly the recorded 0/1 for a
        chain seen at ``t0``); nothing is recorded here. A chain not followed keeps its last
        look (the chains are independent) and shows as off with no changes in the paths;
        :attr:`Paths.followed` says which were."""
        n = devices.size
        tables = self.tables
        group = self.group[devices]
        followed = np.zeros(len(CHAINS), dtype=bool)
        followed[own if own is not None else list(range(1, len(CHAINS)))] = True
        followed[SETTLED] = tables.has_settled
        state0 = np.zeros((len(CHAINS), n), dtype=bool)
        t0 = np.asarray(t0, dtype=float)
        for c in np.flatnonzero(followed):
            # A chain seen at t0 (as at a check-in) is in its recorded state; the others are drawn.
            state0[c] = self.q_last[c][devices] > 0.5
            unseen = np.flatnonzero(self.t_last[c][devices] != t0)
            if unseen.size:
                q = self._probability(devices[unseen], int(c), t0[unseen])
                state0[c, unseen] = rng.random(unseen.size) < q
        flips: list[np.ndarray] = []
        # Flat [C * n] arrays, chain by chain (the layout of state0.reshape(-1)), made once.
        state = state0.reshape(-1).copy()
        now = np.tile(t0, len(CHAINS))
        chain_index = np.repeat(np.arange(len(CHAINS)), n)
        groups = np.tile(group, len(CHAINS))
        stops = np.tile(np.asarray(t_stop, dtype=float), len(CHAINS))
        active = np.repeat(followed, n)
        while active.any():
            idx = np.flatnonzero(active)
            e = rng.exponential(1.0, size=idx.size)
            when = tables.next_flip(groups[idx], chain_index[idx], now[idx], state[idx], e)
            step = np.full(len(CHAINS) * n, np.inf)
            flipped = when <= stops[idx]
            moved = idx[flipped]
            step[moved] = when[flipped]
            flips.append(step.reshape(len(CHAINS), n))
            now[moved] = when[flipped]
            state[moved] ^= True
            active[idx[~flipped]] = False
        stacked = np.stack(flips, axis=2) if flips else np.full((len(CHAINS), n, 0), np.inf)
        return Paths(t0=np.asarray(t0, dtype=float), state0=state0, flips=stacked, t_stop=np.asarray(t_stop),
                     followed=followed)
