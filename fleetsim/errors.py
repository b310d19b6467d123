"""The package's one base exception and its kinds."""

from __future__ import annotations

__all__ = ["FleetsimError", "ConfigError", "TelemetryError"]


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


class TelemetryError(FleetsimError):
    """Telemetry files hold rows that break their format (or cannot be read at all).

    ``problems`` holds the lines to show: one per problem, each naming the file, the row
    (1 is the first data row), the column and the reason, at most ``SHOWN`` of them, then
    ``... and N more``, then the summary of rows read, kept and refused. ``report`` is the
    full account, every problem included (``fleetsim.telemetry.FileReport`` per file), when
    the files were read. ``total`` is the number of problems when ``lines`` holds only the
    first of them.
    """

    SHOWN = 20

    def __init__(self, lines: list[str], summary: str = "", report: list | None = None, total: int | None = None):
        total = len(lines) if total is None else total
        shown = list(lines[: self.SHOWN])
        if total > len(shown):
            shown.append(f"... and {total - len(shown):,} more")
        self.problems = shown + ([summary] if summary else [])
        self.report = report or []
        super().__init__("\n".join(self.problems))
