"""Each device's chains as the run has seen them: last looks, and exact paths during tasks.

:class:`SignalState` keeps, per device and chain (:data:`fleetsim.signals.CHAINS`), the last
time the run looked and the on-probability then (0/1 once seen); :meth:`SignalState.paths`
follows chains exactly through a task (:meth:`fleetsim.signals.SignalTables.next_flip`).

Draws (:mod:`fleetsim.keyed`; a ``numpy.random.Generator`` handed in instead draws in order):
a look at chain c of a device at a check-in tick uses the ``checkin`` stream at (device, the
tick's index, lane c); a task's paths use the ``task`` stream at (device, the index of the
check-in tick that started the participation, lane): lane ``1 + c`` for the state of chain c
at the check-in when it was not seen then, lane ``FLIP_LANE + c * 2**24 + j`` for the
exponential behind the chain's j-th change (j from 0), lane ``CRASH_LANE`` for the crash
(:func:`fleetsim.client.resolve_cohort`). A look may be handed its uniforms instead of a
draw source (the runtime draws every lane of a check-in from one keyed prefix).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .keyed import OrderedDraws, TickDraws, as_draws
from .signals import CHAINS, SETTLED, SignalTables

__all__ = ["SignalState", "Paths"]

Draws = TickDraws | OrderedDraws | np.random.Generator
"""A draw source: keyed by check-in ticks, or in order from a Generator (:mod:`fleetsim.keyed`)."""

CRASH_LANE = 0
"""Lane of the ``task`` stream behind a participation's crash time."""

FLIP_LANE = 2**32
"""First lane of the ``task`` stream's chain changes (chain c, change j: FLIP_LANE + c * 2**24 + j)."""


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

    def observe(self, devices: np.ndarray, chain: int, t: np.ndarray, draws: Draws | np.ndarray) -> np.ndarray:
        """Sample whether ``chain`` is on for ``devices`` at times ``t`` (uniforms of ``draws`` at
        lane ``chain``, or ``draws`` itself, one uniform per device); record it."""
        on = _uniforms(draws, devices, t, chain) < self._probability(devices, chain, t)
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
                       draws: Draws | np.ndarray) -> np.ndarray:
        """Sample several chains of ``devices`` at times ``t`` at once, [len(chains), n] (lane: the
        chain; or ``draws`` itself, the uniforms [len(chains), n]); record them."""
        if not chains:
            return np.zeros((0, devices.size), dtype=bool)
        lanes = np.asarray(chains, dtype=np.int64)[:, None]
        on = _uniforms(draws, devices, t, lanes) < self._probabilities(devices, chains, t)
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

    def paths(self, devices: np.ndarray, t0: np.ndarray, t_stop: np.ndarray, draws: Draws,
              own: list[int] | None = None) -> Paths:
        """The chains' exact paths for ``devices`` from ``t0`` to ``t_stop`` (s): the settled
        chain (when the fleet has one) and the own chains in ``own`` (default: all).

        The states at ``t0`` are drawn given the last looks (exactly the recorded 0/1 for a
        chain seen at ``t0``); nothing is recorded here. A chain not followed keeps its last
        look (the chains are independent) and shows as off with no changes in the paths;
        :attr:`Paths.followed` says which were. Every draw is keyed by the tick of ``t0`` (the
        check-in) and a lane of the chain (and change), see the module doc."""
        n = devices.size
        tables = self.tables
        group = self.group[devices]
        followed = np.zeros(len(CHAINS), dtype=bool)
        followed[own if own is not None else list(range(1, len(CHAINS)))] = True
        followed[SETTLED] = tables.has_settled
        state0 = np.zeros((len(CHAINS), n), dtype=bool)
        t0 = np.asarray(t0, dtype=float)
        at = as_draws(draws).at(devices, t0)  # every lane of a device's participation from one prefix
        for c in np.flatnonzero(followed):
            # A chain seen at t0 (as at a check-in) is in its recorded state; the others are drawn.
            state0[c] = self.q_last[c][devices] > 0.5
            unseen = np.flatnonzero(self.t_last[c][devices] != t0)
            if unseen.size:
                q = self._probability(devices[unseen], int(c), t0[unseen])
                state0[c, unseen] = at.uniform(unseen, 1 + int(c)) < q
        flips: list[np.ndarray] = []
        # Flat [C * n] arrays, chain by chain (the layout of state0.reshape(-1)), made once.
        state = state0.reshape(-1).copy()
        now = np.tile(t0, len(CHAINS))
        chain_index = np.repeat(np.arange(len(CHAINS)), n)
        groups = np.tile(group, len(CHAINS))
        stops = np.tile(np.asarray(t_stop, dtype=float), len(CHAINS))
        active = np.repeat(followed, n)
        who = np.tile(np.arange(n), len(CHAINS))  # each entry's position among the devices
        lane0 = FLIP_LANE + chain_index * 2**24
        while active.any():
            idx = np.flatnonzero(active)
            e = at.exponential(who[idx], lane0[idx] + len(flips))  # change number len(flips) of each
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


def _uniforms(draws: Draws | np.ndarray, devices: np.ndarray, t: np.ndarray, lane: np.ndarray | int) -> np.ndarray:
    """The uniforms of a look: ``draws`` itself when it holds them, else drawn at ``lane``."""
    if isinstance(draws, np.ndarray):
        return draws
    return as_draws(draws).uniform(devices, t, lane)
