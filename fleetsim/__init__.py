"""fleetsim: discrete-event simulation of a device fleet taking part in Federated Averaging rounds.

Public API: load a fleet file with :func:`load_config`, run it with :func:`simulate`, read
the :class:`Result` (pandas tables, ``summary``).
"""

from importlib.metadata import PackageNotFoundError as _PackageNotFoundError
from importlib.metadata import version as _version

from .config import Config, build_config, config_hash, config_schema, example_path, load_config
from .engine import Result, simulate
from .errors import ConfigError, FleetsimError
from .policies import BUILTIN_POLICIES, Candidates, RoundView, SelectionPolicy

try:
    __version__ = _version("fleetsim")
except _PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0"

__all__ = [
    "BUILTIN_POLICIES",
    "Candidates",
    "Config",
    "ConfigError",
    "FleetsimError",
    "Result",
    "RoundView",
    "SelectionPolicy",
    "__version__",
    "build_config",
    "config_hash",
    "config_schema",
    "example_path",
    "load_config",
    "simulate",
]
