"""The package's one base exception and its kinds."""

from __future__ import annotations

__all__ = ["FleetsimError", "ConfigError"]


class FleetsimError(Exception):
    """Base of every error fleetsim raises on purpose; the CLI prints its message and exits 2."""


class ConfigError(FleetsimError):
    """A fleet file or an override is invalid.

    ``problems`` holds one line per problem, each naming the file, the key path, the value
    and what was expected.
    """

    def __init__(self, problems: list[str]):
        self.problems = list(problems)
        super().__init__("\n".join(self.problems))
