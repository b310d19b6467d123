"""The formats' own rules, across rows and files: keys, time order, overlaps, zones, devices.

They run on the rows that passed the schema (:mod:`.validate`), all files of a format
together, one rule after another; a row refused by one rule is not looked at by the next, so
each refused row gets the first reason that applies. Everything is sorting and comparing
whole arrays (device ids are integer codes into their sorted distinct values).
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass, field
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np
import pandas as pd

from ..replay import first_above
from .cells import format_times
from .frames import CATEGORIES
from .schemas import SIGNAL_VALUES
from .validate import Block, shown

__all__ = ["Rows", "Rules", "zone_problem"]

_ZONE_RE = re.compile(r"[A-Za-z0-9_+-]{1,40}(/[A-Za-z0-9_+-]{1,40}){0,3}")
OBSERVED = SIGNAL_VALUES.index("observed")
_LINE = ("device_id", "signal", "start")
"""The order of interval rows the rules share: device, signal, start (the in-memory order)."""


def zone_problem(name: str) -> str | None:
    """Why ``name`` is not an IANA time zone zoneinfo knows, or None."""
    if not _ZONE_RE.fullmatch(name):
        return f"unknown IANA time zone {shown(name)}"
    try:
        ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError, OSError, UnicodeError):
        return f"unknown IANA time zone {shown(name)}"
    return None


@dataclass
class Rows:
    """The schema-valid rows of one format across its files: ``ids`` (global row ids, in file
    order), each column's ``values`` (int64 codes into ``categories`` for text, int64 ns for
    times, float64 for numbers, bool) and ``where`` (global row id -> "row N" or "row N of FILE")."""

    kind: str
    ids: np.ndarray
    values: dict[str, np.ndarray]
    categories: dict[str, np.ndarray]
    where: Callable[[int, int], str]

    def text(self, column: str, positions: np.ndarray) -> np.ndarray:
        return self.categories[column][self.values[column][positions]]

    def codes_of(self, column: str, words: tuple[str, ...]) -> np.ndarray:
        """The column's codes mapped to positions in ``words`` (-1 for any other value)."""
        lookup = np.array([words.index(c) if c in words else -1 for c in self.categories[column]], dtype=np.int64)
        return lookup[self.values[column]]


@dataclass
class Rules:
    """Runs the rules over :class:`Rows`, keeping the rows still alive and the blocks refused."""

    rows: Rows
    alive: np.ndarray = field(init=False)
    blocks: list[Block] = field(default_factory=list)
    _orders: dict[tuple[str, ...], np.ndarray] = field(default_factory=dict, init=False)

    def __post_init__(self) -> None:
        self.alive = np.ones(self.rows.ids.size, dtype=bool)

    def key(self, column: str) -> np.ndarray:
        """The values a column sorts by: a Categorical column's codes in its categories' order."""
        if column in CATEGORIES:
            return self.rows.codes_of(column, CATEGORIES[column])
        return self.rows.values[column]

    def sorted_live(self, columns: tuple[str, ...]) -> np.ndarray:
        """The rows still alive in the order of ``columns`` (ties in file order).

        Sorted once per key (not at all when the rows already come in that order, as files
        written in the in-memory order do) and narrowed to the live rows as rules refuse
        some: a subset of a sorted sequence is still sorted."""
        known = self._orders.get(columns)
        if known is None:
            live = np.flatnonzero(self.alive)
            keys = [self.key(c)[live] for c in columns]
            known = live if _in_order(keys) else live[np.lexsort(keys[::-1])]
        else:
            known = known[self.alive[known]]
        self._orders[columns] = known
        return known

    def refuse(self, positions: np.ndarray, column: str, reasons: str | list[str]) -> None:
        if positions.size:
            self.blocks.append(Block(self.rows.ids[positions], column, reasons))
            self.alive[positions] = False

    def _other(self, positions: np.ndarray, others: np.ndarray) -> list[str]:
        ids = self.rows.ids
        return [self.rows.where(int(ids[o]), int(ids[p])) for p, o in zip(positions, others, strict=True)]

    def unique(self, columns: list[str], label: str) -> None:
        """Rows whose values of ``columns`` repeat an earlier row's (the later ones are refused)."""
        order = self.sorted_live(tuple(columns))  # stable: equal keys stay in file order
        if order.size < 2:
            return
        same = np.ones(order.size - 1, dtype=bool)
        for c in columns:
            v = self.rows.values[c][order]
            same &= v[1:] == v[:-1]
        # The first row of each run of equal keys is the one the later ones repeat.
        run_start = np.maximum.accumulate(np.where(np.concatenate([[True], ~same]), np.arange(order.size), 0))
        later = np.flatnonzero(np.concatenate([[False], same]))
        firsts = order[run_start[later]]
        self.refuse(order[later], label, [f"repeats {w} (same {', '.join(columns)})"
                                          for w in self._other(order[later], firsts)])

    def end_after_start(self) -> None:
        live = np.flatnonzero(self.alive)
        start, end = self.rows.values["start"][live], self.rows.values["end"][live]
        bad = live[end <= start]
        self.refuse(bad, "end", [f"{e} is not after start {s}" for s, e in
                                 zip(format_times(self.rows.values["start"][bad]),
                                     format_times(self.rows.values["end"][bad]), strict=True)])

    def zones_known(self) -> None:
        zones = self.rows.categories["timezone"]
        reasons = [zone_problem(str(z)) for z in zones]
        unknown = np.array([r is not None for r in reasons], dtype=bool)
        bad = np.flatnonzero(self.alive & unknown[self.rows.values["timezone"]])
        self.refuse(bad, "timezone", [reasons[c] or "" for c in self.rows.values["timezone"][bad]])

    def constant_per_device(self, columns: list[str]) -> None:
        """A device's ``columns`` must read as on its first row (in file order)."""
        live = np.flatnonzero(self.alive)
        device = self.rows.values["device_id"][live]
        _, first, inverse = np.unique(device, return_index=True, return_inverse=True)
        for column in columns:
            values = self.rows.values[column][live]
            base = values[first][inverse]
            differs = (values != base) & self.alive[live]
            bad, origin = live[differs], live[first[inverse[differs]]]
            self.refuse(bad, column, [f"{shown(v)} differs from {shown(b)} on {w}, the device's first row"
                                      for v, b, w in zip(self.rows.text(column, bad), self.rows.text(column, origin),
                                          self._other(bad, origin), strict=True)])

    def agree_with(self, reference: pd.DataFrame, columns: list[str], what: str) -> None:
        """Each device's ``columns`` must read as in ``reference`` (indexed by device id), where it is there."""
        if reference is None or not len(reference):
            return
        devices = pd.Index(self.rows.categories["device_id"])
        at = reference.index.get_indexer(devices)
        for column in columns:
            expected = np.where(at >= 0, reference[column].to_numpy(dtype=object)[np.maximum(at, 0)], None)
            words = self.rows.categories[column]
            live = np.flatnonzero(self.alive)
            want = expected[self.rows.values["device_id"][live]]
            have = words[self.rows.values[column][live]]
            bad = live[(want != None) & (want != have)]  # noqa: E711 - elementwise on an object array
            wanted = expected[self.rows.values["device_id"][bad]]
            self.refuse(bad, column, [f"{shown(h)} differs from {shown(w)} in the {what}"
                                      for h, w in zip(self.rows.text(column, bad), wanted, strict=True)])

    def no_overlap(self) -> None:
        """Rows of one device and signal must not overlap (each is refused against the earlier one it overlaps)."""
        order = self.sorted_live(_LINE)  # stable: ties in file order
        if not order.size:
            return
        values = self.rows.values
        line = values["device_id"][order] * len(self.rows.categories["signal"]) + values["signal"][order]
        s, e = values["start"][order], values["end"][order]
        reach = pd.Series(e).groupby(line).cummax().to_numpy()
        first = np.concatenate([[True], line[1:] != line[:-1]])
        record = np.maximum.accumulate(np.where(first | (e == reach), np.arange(order.size), 0))
        previous = np.concatenate([[0], reach[:-1]])
        overlaps = np.flatnonzero(~first & (s < previous))
        bad, against = order[overlaps], order[record[overlaps - 1]]
        self.refuse(bad, "start", [f"overlaps {w} (same device and signal)" for w in self._other(bad, against)])

    def inside_observed(self) -> None:
        """Every signal row must lie within one of its device's observed intervals."""
        order = self.sorted_live(_LINE)
        if not order.size:
            return
        signal = self.key("signal")[order]
        device, start, end = (self.rows.values[c][order] for c in ("device_id", "start", "end"))
        observed = signal == OBSERVED
        # In this order a device's observed rows are sorted by start; each signal row meets
        # the latest of them starting at or before it (observed first on a tie).
        rows = np.flatnonzero(~observed)
        holder = _latest_at_or_before(device[observed], start[observed], device[rows], start[rows])
        inside = (holder >= 0) & (end[observed][np.maximum(holder, 0)] >= end[rows])
        self.refuse(order[rows[~inside]], "signal", "lies outside every observed interval of its device")

    def times_increase(self) -> None:
        """A device's snapshot times must strictly increase in file order."""
        live = np.flatnonzero(self.alive)
        device, time = self.rows.values["device_id"][live], self.rows.values["time"][live]
        order = np.argsort(device, kind="stable")
        same = np.concatenate([[False], device[order][1:] == device[order][:-1]])
        t = time[order]
        back = np.flatnonzero(same & (t <= np.concatenate([[0], t[:-1]])))
        bad, before = live[order[back]], live[order[back - 1]]
        self.refuse(bad, "time", [f"{t0} is not after the device's previous check-in {t1} on {w}" for t0, t1, w in
                                  zip(format_times(self.rows.values["time"][bad]),
                                      format_times(self.rows.values["time"][before]), self._other(bad, before),
                                      strict=True)])


def _in_order(keys: list[np.ndarray]) -> bool:
    """Whether rows already come in the lexicographic order of ``keys`` (first key first)."""
    if keys[0].size < 2:
        return True
    ahead = np.zeros(keys[0].size - 1, dtype=bool)
    tied = np.ones(keys[0].size - 1, dtype=bool)
    for k in keys:
        ahead |= tied & (k[1:] > k[:-1])
        tied &= k[1:] == k[:-1]
    return bool((ahead | tied).all())


def _latest_at_or_before(group: np.ndarray, start: np.ndarray, at_group: np.ndarray, at: np.ndarray) -> np.ndarray:
    """For each query (``at_group``, ``at``), the index of the last row of ``group`` (sorted,
    ``start`` sorted within each group) in the same group with ``start <= at``, or -1: the
    replay's search within each query's own group (:func:`fleetsim.replay.first_above`)."""
    first = np.searchsorted(group, at_group, side="left")
    lo, hi = first.copy(), np.searchsorted(group, at_group, side="right")
    # A group of one row (a device observed once, the common case) needs no search.
    single = np.flatnonzero(hi - lo == 1)
    lo[single] += start[first[single]] <= at[single]
    hi[single] = lo[single]
    found = first_above(start, lo, hi, at) if start.size else lo
    return np.where(found > first, found - 1, -1)
