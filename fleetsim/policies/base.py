"""The policy plug-in interface: what a selection policy is handed and what it declares.

The engine calls exactly two hooks on a policy, both declared here on
:class:`SelectionPolicy`, and reads two attributes:

- ``choose(candidates, round, rng) -> positions``: required. The eligible check-ins of one
  collection window (:class:`Candidates`) and what may be known of the round
  (:class:`RoundView`); it returns the positions it accepts, at most ``round.needed``.
- ``rank(candidates, round, rng) -> keys or None``: optional. The default returns None (no
  ranking: the policy is shown every eligible check-in of each window). A policy that
  returns one key per check-in lets the engine look at check-ins in key order only until it
  has found as many eligible ones as the round needs.
- ``window_s``: length of a collection window, s (the engine may use shorter windows at the
  end of the selection timeout);
- ``holds_checkins``: if true the server holds each window's check-ins and accepts at the
  window's end; if false it accepts at check-in time, and the policy must choose causally
  (a check-in's fate may depend only on earlier check-ins in the window), so that the engine
  may pass long windows without changing the outcome.

The engine only reads a policy: it never sets attributes on it. This module imports neither
pandas nor anything of fleetsim, so importing it stays cheap.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, ClassVar

import numpy as np

if TYPE_CHECKING:
    import pandas as pd

__all__ = ["Candidates", "RoundView", "SelectionPolicy"]


class Candidates:
    """The check-ins of one collection window, in check-in order.

    Every array has one entry per check-in. Times are simulated seconds from the horizon
    start. ``predicted_s`` is the server's estimate of the device's task time from its
    reported traits (download + training + upload at its nominal speeds). Per-device
    attributes are gathered on first access, so a policy pays only for what it reads.

    Attributes: ``device``, ``checkin_s``, ``battery_pct``, ``charging``, ``device_type``,
    ``region``, ``samples``, ``predicted_s``, ``last_participation_s`` (-inf for a device
    that never took part), ``participations``, ``type_names``, ``region_names``. In the set
    handed to :meth:`SelectionPolicy.rank` eligibility is not known yet: ``battery_pct`` is
    NaN and ``charging`` False there. :meth:`keyed` gives random numbers tied to the
    check-ins themselves (the same check-in draws the same number in every run of a seed).
    """

    _GATHERED = ("device_type", "region", "samples", "predicted_s", "last_participation_s", "participations")

    def __init__(
        self,
        device: np.ndarray,
        checkin_s: np.ndarray,
        battery_pct: np.ndarray,
        charging: np.ndarray,
        fleet_arrays: dict[str, np.ndarray],
        type_names: tuple[str, ...],
        region_names: tuple[str, ...],
        keyed_draws: Any = None,
    ):
        self.device = device
        self.checkin_s = checkin_s
        self.battery_pct = battery_pct
        self.charging = charging
        self.type_names = type_names
        self.region_names = region_names
        self._fleet_arrays = fleet_arrays
        self._keyed_draws = keyed_draws

    def keyed(self, lane: int = 0, since_s: float | None = None) -> np.ndarray | None:
        """One uniform number in [0, 1) per check-in, a pure function of the run's seed, the
        device, a check-in tick of the device and ``lane`` (the ``policy`` stream, keyed: see
        docs/policies.md), or None for candidates not built by the engine.

        The tick is the check-in's own; with ``since_s``, the device's first tick at or after
        ``since_s`` instead: ``since_s=round.now_s`` gives each device one number per window
        whichever of its ticks in the window is shown (in :meth:`SelectionPolicy.rank` and in
        ``choose`` alike). Draws nothing from the ``rng`` stream."""
        draws = self._keyed_draws
        if draws is None:
            return None
        if since_s is None:
            return draws.uniform(self.device, self.checkin_s, lane)
        return draws.uniform_from(self.device, float(since_s), lane)

    def __getattr__(self, name: str) -> np.ndarray:
        # Called only for attributes not yet set: gather the per-device array once (on this
        # window's candidates, never on the policy).
        if name in Candidates._GATHERED:
            value = self._fleet_arrays[name][self.device]
            setattr(self, name, value)
            return value
        raise AttributeError(name)

    # Declared for type checkers; filled in by __getattr__ on first access.
    device_type: np.ndarray
    region: np.ndarray
    samples: np.ndarray
    predicted_s: np.ndarray
    last_participation_s: np.ndarray
    participations: np.ndarray

    def __len__(self) -> int:
        return int(self.device.size)

    def frame(self) -> pd.DataFrame:
        """The candidates as a DataFrame (for plug-ins that prefer pandas).

        pandas is imported here, on first use, so that a run whose policy never asks for a
        frame does not pay for importing it.
        """
        import pandas as pd

        return pd.DataFrame(
            {
                "device": self.device,
                "checkin_s": self.checkin_s,
                "device_type": pd.Categorical.from_codes(self.device_type, self.type_names),
                "region": pd.Categorical.from_codes(self.region, self.region_names),
                "samples": self.samples,
                "predicted_s": self.predicted_s,
                "battery_pct": self.battery_pct,
                "charging": self.charging,
                "last_participation_s": self.last_participation_s,
                "participations": self.participations,
            }
        )


@dataclass(frozen=True)
class RoundView:
    """What a policy may know of the round being filled."""

    round_index: int  # counted from the first round of the warm-up
    opened_s: float
    now_s: float  # start of this collection window
    timeout_s: float  # when the selection timeout passes
    accept_count: int  # ceil(target_reports * over_selection)
    needed: int  # still to accept
    accepted_by_type: np.ndarray  # accepted so far, per device type
    type_shares: np.ndarray  # device types' configured fleet shares


class SelectionPolicy:
    """Base of all selection policies; override :meth:`choose`, and :meth:`rank` if the
    policy can order check-ins before their eligibility is known.

    Defaults: ``holds_checkins = True``, ``window_s = 20.0`` seconds, ``name = "custom"``.
    Raises nothing itself; a ``choose`` that returns positions out of range, more than
    ``round.needed`` of them, or a device twice makes the engine raise FleetsimError naming
    the policy.
    """

    name: ClassVar[str] = "custom"
    holds_checkins: bool = True
    window_s: float = 20.0

    def choose(self, candidates: Candidates, round: RoundView, rng: np.random.Generator) -> np.ndarray:
        """Return positions (into ``candidates``) to accept: at most ``round.needed``, distinct.

        ``rng`` is the run's ``policy`` stream: draw from it, never from global random state.
        """
        raise NotImplementedError

    def rank(self, candidates: Candidates, round: RoundView, rng: np.random.Generator) -> np.ndarray | None:
        """Order this window's check-ins before their eligibility is known, or return None.

        None (the default) means "no ranking: show me every eligible check-in". Otherwise
        return one key per check-in (a float array of ``len(candidates)``; lower comes first).
        ``candidates`` holds each free device once, at its first tick in the window, with
        ``battery_pct`` NaN and ``charging`` False. The engine then looks at check-ins in key
        order (ties by check-in order), checks their eligibility, and stops once it has found
        ``round.needed`` eligible ones or run out; ``choose`` is called on the eligible ones
        found, in check-in order. A key of +inf (or NaN) is never looked at, so never chosen;
        -inf comes before every finite key.

        The contract that makes this safe: ``choose``, on any set holding the ``needed``
        lowest-keyed eligible check-ins (and perhaps more), must return those (for a random
        ranking: a set with the same law). A ranked window then chooses like a full window,
        at a cost that grows with what the round needs, not with the fleet.
        """
        return None
