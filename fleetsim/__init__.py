"""fleetsim: discrete-event simulation of a device fleet taking part in Federated Averaging rounds.

Public API: load a fleet file with :func:`load_config`, run it with :func:`simulate`, read
the :class:`Result` (pandas tables, ``summary``).

The names are loaded on first use (PEP 562), so that ``import fleetsim`` and the commands
that only read a fleet file start without loading the simulation and its table libraries.
"""

from importlib import import_module as _import_module
from typing import Any as _Any

__version__: str  # set on first use by __getattr__ (from the package metadata)

# Public name -> the module that defines it.
_HOMES = {
    "BUILTIN_POLICIES": "policies",
    "Candidates": "policies",
    "Config": "config",
    "ConfigError": "errors",
    "FleetsimError": "errors",
    "Result": "result",
    "RoundView": "policies",
    "SelectionPolicy": "policies",
    "build_config": "config",
    "config_hash": "config",
    "config_schema": "config",
    "example_path": "config",
    "load_config": "config",
    "simulate": "engine",
}

__all__ = sorted([*_HOMES, "__version__"])

def _read_version() -> str:
    """The installed package's version (package metadata); 0.0.0 in a source tree not installed."""
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("fleetsim")
    except PackageNotFoundError:
        return "0.0.0"


def __getattr__(name: str) -> _Any:
    """Load a public name from its module on first use (then it is a plain attribute)."""
    if name == "__version__":  # read on first use: the metadata reader costs a noticeable start-up time
        globals()[name] = _read_version()
        return globals()[name]
    home = _HOMES.get(name)
    if home is None:
        raise AttributeError(f"module 'fleetsim' has no attribute {name!r}")
    value = getattr(_import_module(f".{home}", __name__), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted({*globals(), *_HOMES, "__version__"})
