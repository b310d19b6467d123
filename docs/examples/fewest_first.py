"""A worked ranked plug-in: prefer the devices that have taken part least so far.

A device's participation count is known before the server knows whether its check-in is
eligible, so the policy can rank check-ins first and let the engine look at them in that
order only until the round has enough. Use it from a fleet file (with this folder on
PYTHONPATH):

    selection:
      policy: fewest_first:FewestFirst
      params: {window: 20}
"""

import numpy as np

from fleetsim import Candidates, RoundView, SelectionPolicy


class FewestFirst(SelectionPolicy):
    """Hold each window's check-ins; accept those with the fewest participations, ties by
    check-in order. ``most``: if set, refuse devices that already took part that often."""

    name = "fewest-first"
    holds_checkins = True  # decide at the end of each collection window

    def __init__(self, window: float = 20.0, most: int | None = None):
        self.window_s = float(window)
        self.most = most

    def rank(self, candidates: Candidates, round: RoundView, rng: np.random.Generator) -> np.ndarray:
        # The key choose sorts by; +inf: never chosen, so the engine never looks at it.
        key = candidates.participations.astype(float)
        if self.most is not None:
            key[key >= self.most] = np.inf
        return key

    def choose(self, candidates: Candidates, round: RoundView, rng: np.random.Generator) -> np.ndarray:
        # The same order as rank, on whatever eligible set the engine hands over: that is what
        # makes a ranked window choose like a full one.
        order = np.argsort(candidates.participations, kind="stable")
        if self.most is not None:
            order = order[candidates.participations[order] < self.most]
        return order[: round.needed]


class FewestFirstUnranked(FewestFirst):
    """The same policy without its ranking: the engine shows it every eligible check-in."""

    name = "fewest-first-unranked"
    rank = SelectionPolicy.rank  # the default: return None, no ranking
