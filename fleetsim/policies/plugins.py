"""Building a policy by name: a built-in, or a plug-in named ``package.module:Name``.

:func:`make_policy` checks a policy before anything runs: a plug-in must be a
:class:`SelectionPolicy` subclass defining ``choose``; the built policy's ``choose`` and
``rank`` must be callable as ``(candidates, round, rng)``, ``window_s`` a finite number of
seconds of at least 1 ms and ``holds_checkins`` a bool. Every refusal is one line naming
the policy. Nothing is written onto the policy object.
"""

from __future__ import annotations

import importlib
import inspect
import math
import re
from typing import Any

import numpy as np

from ..errors import ConfigError
from .base import SelectionPolicy
from .builtin import BUILTIN_POLICIES

__all__ = ["MIN_WINDOW_S", "make_policy"]

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
    its constructor refuses the parameters (any exception it raises), or the built policy
    fails :func:`_check_built` (hooks callable as ``(candidates, round, rng)``, ``window_s``
    a finite number of seconds of at least 1 ms, ``holds_checkins`` a bool).
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
    _check_built(policy, name, source)
    return policy


_HOOKS = ("choose", "rank")


def _check_built(policy: SelectionPolicy, name: str, source: str) -> None:
    """Refuse a built policy the engine could not drive; read its attributes only.

    Raises ConfigError (one line naming the policy) unless ``choose`` and ``rank`` can be
    called as ``(candidates, round, rng)``, ``window_s`` is a finite number of seconds of at
    least MIN_WINDOW_S (not a bool) and ``holds_checkins`` is a bool.
    """
    where = f"{source}.policy: policy {name!r}"
    for hook in _HOOKS:
        method = _read(policy, hook, where)
        if not callable(method):
            raise ConfigError([f"{where}: {hook} must be a method {hook}(candidates, round, rng) "
                               f"(got {_shown(method)})"])
        try:
            signature = inspect.signature(method)
        except (TypeError, ValueError):
            continue  # no signature to read (a builtin callable): the call itself will tell
        try:
            signature.bind(None, None, None)
        except TypeError:
            raise ConfigError([f"{where}: {hook} must take (candidates, round, rng) "
                               f"(got {hook}{str(signature)[:80]})"]) from None
    window = _read(policy, "window_s", where)
    if isinstance(window, (bool, np.bool_)) or not isinstance(window, (int, float, np.integer, np.floating)) \
            or not math.isfinite(window) or window < MIN_WINDOW_S:
        raise ConfigError([f"{where}: window_s must be a finite number of seconds, at least "
                           f"{MIN_WINDOW_S:g} (got {_shown(window)})"])
    holds = _read(policy, "holds_checkins", where)
    if not isinstance(holds, (bool, np.bool_)):
        raise ConfigError([f"{where}: holds_checkins must be True or False (got {_shown(holds)})"])


def _read(policy: SelectionPolicy, attribute: str, where: str) -> Any:
    """``policy.attribute``; ConfigError in one line if reading it fails (a property may raise)."""
    try:
        return getattr(policy, attribute)
    except (Exception, SystemExit) as exc:  # a plug-in's property may raise anything
        raise ConfigError([f"{where}: reading {attribute} failed ({type(exc).__name__}: {_one_line(exc)})"]) from None
