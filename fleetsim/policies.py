"""Selection policies: which check-ins a round accepts.

A policy has one required method, :meth:`SelectionPolicy.choose`. The engine hands it the
eligible check-ins of one collection window as arrays (:class:`Candidates`) and the number
of devices the round still needs; it returns the positions it accepts, in bulk. Two
attributes shape the windows:

- ``window_s``: length of a collection window (the engine may use shorter windows at the
  end of the selection timeout);
- ``holds_checkins``: if true the server holds each window's check-ins and accepts at the
  window's end; if false it accepts at check-in time, and the policy must choose causally
  (a check-in's fate may depend only on earlier check-ins in the window), so that the engine
  may pass long windows without changing the outcome.

Every built-in policy is written on this same interface. A plug-in is named in the fleet
file as ``package.module:Name`` and built with the file's ``params`` as keyword arguments;
see docs/policies.md for a worked example.
"""

from __future__ import annotations

import importlib
import inspect
import math
import re
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np
import pandas as pd

from .errors import ConfigError

__all__ = [
    "Candidates",
    "RoundView",
    "SelectionPolicy",
    "FirstCome",
    "Lottery",
    "QuickFinish",
    "ShareQuota",
    "RestedFirst",
    "BUILTIN_POLICIES",
    "make_policy",
]


class Candidates:
    """The eligible check-ins of one collection window, in check-in order.

    Every array has one entry per check-in. Times are simulated seconds from the horizon
    start. ``predicted_s`` is the server's estimate of the device's task time from its
    reported traits (download + training + upload at its nominal speeds). Per-device
    attributes are gathered on first access, so a policy pays only for what it reads.

    Attributes: ``device``, ``checkin_s``, ``battery_pct``, ``charging``, ``device_type``,
    ``region``, ``samples``, ``predicted_s``, ``last_participation_s`` (-inf for a device
    that never took part), ``participations``, ``type_names``, ``region_names``.
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
    ):
        self.device = device
        self.checkin_s = checkin_s
        self.battery_pct = battery_pct
        self.charging = charging
        self.type_names = type_names
        self.region_names = region_names
        self._fleet_arrays = fleet_arrays

    def __getattr__(self, name: str) -> np.ndarray:
        # Called only for attributes not yet set: gather the per-device array once.
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
        """The candidates as a DataFrame (for plug-ins that prefer pandas)."""
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

    round_index: int
    opened_s: float
    now_s: float  # start of this collection window
    timeout_s: float  # when the selection timeout passes
    accept_count: int  # ceil(target_reports * over_selection)
    needed: int  # still to accept
    accepted_by_type: np.ndarray  # accepted so far, per device type
    type_shares: np.ndarray  # device types' configured fleet shares


class SelectionPolicy:
    """Base of all selection policies; override :meth:`choose`.

    Raises nothing itself; a plug-in that returns positions out of range or repeated makes
    the engine raise FleetsimError naming the policy.
    """

    name: ClassVar[str] = "custom"
    holds_checkins: bool = True
    window_s: float = 20.0

    def choose(self, candidates: Candidates, round: RoundView, rng: np.random.Generator) -> np.ndarray:
        """Return positions (into ``candidates``) to accept: at most ``round.needed``."""
        raise NotImplementedError

    # Optional: a policy may define ``rank(candidates, round, rng) -> array`` returning a key
    # per check-in, computed before eligibility is known (``battery_pct`` is NaN and
    # ``charging`` False at that point), such that ``choose`` on any set holding the
    # ``needed`` lowest-keyed eligible check-ins returns those (an infinite key: never
    # chosen). The engine then looks only at as many check-ins as the policy can use.



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
    ``needed`` of them are drawn without replacement."""

    name = "lottery"
    holds_checkins = True

    def __init__(self, window: float = 20.0):
        self.window_s = float(window)

    def rank(self, candidates: Candidates, round: RoundView, rng: np.random.Generator) -> np.ndarray:
        # A uniformly random order: the first `needed` eligible in it are a uniform draw.
        return rng.random(len(candidates))

    def choose(self, candidates: Candidates, round: RoundView, rng: np.random.Generator) -> np.ndarray:
        take = min(round.needed, len(candidates))
        return np.sort(rng.choice(len(candidates), size=take, replace=False))


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


_MODULE_RE = re.compile(r"[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z_][A-Za-z0-9_]*)*")
_ATTR_RE = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")

MIN_WINDOW_S = 0.001
"""Shortest collection window, s (1 ms): a window must move simulated time on."""

# Parameters of the built-in policies: (lowest, highest, None allowed). Every value must be a
# finite real number, never a boolean or text.
_BUILTIN_PARAMS: dict[str, tuple[float, float, bool]] = {
    "window": (MIN_WINDOW_S, 7 * 86400.0, False),
    "max_predicted": (MIN_WINDOW_S, 1e12, True),
    "relax_after": (0.0, 1.0, False),
}


def _check_builtin_params(name: str, factory: Any, params: dict[str, Any], source: str) -> None:
    """Refuse unknown names and non-numeric, non-finite or out-of-range values of a built-in."""
    accepted = [p for p in inspect.signature(factory).parameters if p != "self"]
    problems = []
    for key, value in params.items():
        if key not in accepted:
            problems.append(f"{source}.params.{key}: policy {name!r} refused its parameters: unknown parameter; "
                            f"expected one of {', '.join(accepted) or 'none'} (got {_shown(value)})")
            continue
        low, high, optional = _BUILTIN_PARAMS[key]
        if value is None and optional:
            continue
        number = value if isinstance(value, (int, float)) and not isinstance(value, bool) else None
        if number is None or not math.isfinite(number) or not low <= number <= high:
            unit = " (a fraction of the selection timeout)" if key == "relax_after" else " of seconds"
            kind = "a positive number" if low > 0 else "a number"
            problems.append(f"{source}.params.{key}: policy {name!r} refused its parameters: expected {kind}{unit} "
                            f"from {low:g} to {high:g} (got {_shown(value)})")
    if problems:
        raise ConfigError(problems)


def _shown(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _import_plugin(name: str, source: str) -> type[SelectionPolicy]:
    """The class ``package.module:Name`` names; ConfigError unless it is a SelectionPolicy subclass."""
    module_name, _, attr = name.partition(":")
    if not _MODULE_RE.fullmatch(module_name) or not _ATTR_RE.fullmatch(attr):
        raise ConfigError([f"{source}.policy: expected a built-in name or package.module:Name (got {_shown(name)})"])
    try:
        module = importlib.import_module(module_name)
        factory = getattr(module, attr)
    except (Exception, SystemExit) as exc:  # an import can fail in any way; report it in one line
        raise ConfigError(
            [f"{source}.policy: cannot import plug-in {name!r} ({type(exc).__name__}: {_one_line(exc)})"]
        ) from None
    if not (isinstance(factory, type) and issubclass(factory, SelectionPolicy)):
        raise ConfigError([f"{source}.policy: {name!r} is not a fleetsim.SelectionPolicy subclass "
                           f"(got {_shown(factory)})"])
    if factory.choose is SelectionPolicy.choose:
        raise ConfigError([f"{source}.policy: {name!r} has no choose(candidates, round, rng) method of its own "
                           f"(got {_shown(factory)})"])
    return factory


def _one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split())[:200]


def make_policy(name: str, params: dict[str, Any], source: str = "selection") -> SelectionPolicy:
    """Build a built-in policy by name, or a plug-in from ``package.module:Name``.

    A plug-in must be a :class:`SelectionPolicy` subclass. Built-in parameters must be finite
    numbers in range (``window`` at least 1 ms); a plug-in's must fit its constructor. Raises
    ConfigError if the name is unknown, the plug-in cannot be imported or is not a subclass,
    its constructor refuses the parameters (any exception it raises), or the built policy's
    ``window_s`` is not a number of seconds of at least 1 ms or ``holds_checkins`` is not a bool.
    """
    if not isinstance(params, dict) or not all(isinstance(key, str) for key in params):
        raise ConfigError([f"{source}.params: expected a mapping of parameter names to values (got {_shown(params)})"])
    if name in BUILTIN_POLICIES:
        factory: type[SelectionPolicy] = BUILTIN_POLICIES[name]
        _check_builtin_params(name, factory, params, source)
    elif isinstance(name, str) and ":" in name:
        factory = _import_plugin(name, source)
    else:
        raise ConfigError(
            [f"{source}.policy: unknown policy {_shown(name)}; expected one of "
             f"{', '.join(BUILTIN_POLICIES)} or package.module:Name"]
        )
    try:
        inspect.signature(factory).bind(**params)
    except TypeError as exc:
        raise ConfigError([f"{source}.params: policy {name!r} refused its parameters: {_one_line(exc)}"]) from None
    except ValueError:
        pass  # no signature to check against: let the constructor decide
    try:
        policy = factory(**params)
    except (Exception, SystemExit) as exc:  # a plug-in's constructor may raise anything
        raise ConfigError(
            [f"{source}.params: policy {name!r} refused its parameters ({type(exc).__name__}: {_one_line(exc)})"]
        ) from None
    window = getattr(policy, "window_s", None)
    if isinstance(window, bool) or not isinstance(window, (int, float)) or not math.isfinite(window) \
            or window < MIN_WINDOW_S:
        raise ConfigError([f"{source}.params.window: expected a positive number of seconds, at least "
                           f"{MIN_WINDOW_S:g} (got {_shown(window)})"])
    if not isinstance(getattr(policy, "holds_checkins", None), (bool, np.bool_)):
        raise ConfigError([f"{source}.policy: {name!r} must set holds_checkins to True or False "
                           f"(got {_shown(getattr(policy, 'holds_checkins', None))})"])
    return policy
