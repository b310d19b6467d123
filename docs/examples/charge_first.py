"""A worked selection-policy plug-in: prefer the fullest batteries, refuse the emptiest.

Use it from a fleet file (with this folder on PYTHONPATH):

    selection:
      policy: charge_first:ChargeFirst
      params: {window: 20, floor: 50}
"""

import numpy as np

from fleetsim import Candidates, RoundView, SelectionPolicy


class ChargeFirst(SelectionPolicy):
    """Hold each window's check-ins; accept the highest battery levels at or above ``floor``."""

    name = "charge-first"
    holds_checkins = True  # decide at the end of each collection window

    def __init__(self, window: float = 20.0, floor: float = 0.0):
        self.window_s = float(window)
        self.floor = float(floor)

    def choose(self, candidates: Candidates, round: RoundView, rng: np.random.Generator) -> np.ndarray:
        order = np.argsort(-candidates.battery_pct, kind="stable")  # fullest first
        order = order[candidates.battery_pct[order] >= self.floor]
        return order[: round.needed]


class ChargeFirstPandas(ChargeFirst):
    """The same choice written with pandas, to show what a DataFrame per window costs."""

    name = "charge-first-pandas"

    def choose(self, candidates: Candidates, round: RoundView, rng: np.random.Generator) -> np.ndarray:
        frame = candidates.frame()
        frame = frame[frame["battery_pct"] >= self.floor]
        return frame.sort_values("battery_pct", ascending=False, kind="stable").index.to_numpy()[: round.needed]


class ChargeFirstLoop(ChargeFirst):
    """The same choice as a plain Python loop over check-ins: the slow way."""

    name = "charge-first-loop"

    def choose(self, candidates: Candidates, round: RoundView, rng: np.random.Generator) -> np.ndarray:
        picks = [(float(level), i) for i, level in enumerate(candidates.battery_pct) if level >= self.floor]
        picks.sort(key=lambda item: -item[0])
        return np.array([i for _, i in picks[: round.needed]], dtype=np.int64)
