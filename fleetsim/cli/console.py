"""What every command shares: the one-line error printer, the fleet-file reader with the
command-line options applied, option checks and the progress bar.

Nothing here imports the simulation or a table library (the selection policies, which need
the array library, are imported when a fleet file is read): the commands that only read a
fleet file stay quick to start.
"""

from __future__ import annotations

import math
import sys
import unicodedata
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import typer

from ..config import Config, check_memory, example_path, load_config
from ..errors import ConfigError, FleetsimError

__all__ = [
    "FILE_HELP", "FileArg", "SetOpt", "MAX_DEVICES", "MAX_SEED", "OptionValueError", "fail", "one_line",
    "progress_bar", "read_config", "seed_option",
]

FILE_HELP = "Fleet file (YAML). Default: the bundled Inkwren example."
FileArg = typer.Argument(None, help=FILE_HELP, show_default=False)
SetOpt = typer.Option([], "--set", help="Override a key of the file: key.path=value (repeatable).")

MAX_DEVICES = 100_000_000
MAX_SEED = 2**63 - 1
"""The largest seed (seeds are whole numbers from 0 on, as :func:`fleetsim.simulate` takes them)."""


class OptionValueError(typer.BadParameter):
    """An option's value is out of range; its message is the whole text after ``OPTION:``."""


def one_line(text: str) -> str:
    """``text`` with every character that could break or reorder a terminal line escaped."""
    return "".join(
        char if char == " " or (char.isprintable() and unicodedata.category(char) not in ("Cf", "Zl", "Zp"))
        else char.encode("unicode_escape").decode("ascii")
        for char in text
    )


def fail(error: FleetsimError) -> None:
    """Print ``error`` as ``error:`` lines on stderr (each one line, control characters
    escaped) and exit with status 2."""
    lines = error.problems if isinstance(error, ConfigError) else str(error).splitlines() or [repr(error)]
    for line in lines:
        typer.echo(f"error: {one_line(line)}", err=True)
    raise typer.Exit(2)


def _seed_in_range(value: int | None) -> int | None:
    """Option callback: a seed is a whole number from 0 to 2**63 - 1 (raises OptionValueError)."""
    if value is not None and not 0 <= value <= MAX_SEED:
        raise OptionValueError(f"expected a whole number from 0 to 2**63 - 1 (got {value})")
    return value


def seed_option(default: int, name: str, help: str) -> Any:
    """A seed option ``name`` (e.g. ``--seed``), checked to be in range before the command runs."""
    return typer.Option(default, name, help=help, callback=_seed_in_range)


def _check_options(devices: int | None, days: float | None) -> None:
    """--devices and --days, refused before they reach the file (naming the option)."""
    problems = []
    if devices is not None and (isinstance(devices, bool) or not 1 <= devices <= MAX_DEVICES):
        problems.append(f"--devices: expected a whole number from 1 to {MAX_DEVICES:,} (got {devices})")
    if days is not None and not (math.isfinite(days) and days * 86400.0 >= 0.001):
        problems.append(f"--days: expected a positive, finite number of days (got {days})")
    if problems:
        raise ConfigError(problems)


def _as_option(problems: list[str], prefix: str, option: str, value: Any) -> list[str]:
    """Lines about a key an option set, reworded to name the option and its value as typed."""
    out = []
    for line in problems:
        if line.startswith(prefix):
            rest = line[len(prefix):]
            cut = rest.rfind(" (got ")
            rest = rest[:cut] if cut >= 0 and rest.endswith(")") else rest
            line = f"{option}: {rest} (got {value})"
        out.append(line)
    return out


def read_config(
    file: Path | None, overrides: list[str], devices: int | None = None, days: float | None = None
) -> Config:
    """Load the fleet file with --set, --devices and --days applied (all validated alike).

    Also builds the selection policy and refuses a run whose estimated memory exceeds 75% of
    physical memory. Raises ConfigError; lines about --devices/--days name the option.
    """
    from ..policies import make_policy  # here: --help and schema start without the array library

    path = file if file is not None else example_path()
    _check_options(devices, days)
    extra = list(overrides)
    names: dict[str, str] = {}
    if devices is not None:
        extra.append(f"fleet.devices={devices}")
        names["fleet.devices"] = "--devices"
    if days is not None:
        extra.append(f"horizon.duration={days * 86400.0!r}")
        names["horizon.duration"] = "--days"
    try:
        config = load_config(path, extra)
        # An unimportable plug-in fails now, naming the file (and the workload's key path).
        for job in config.jobs:
            where = "selection" if not config.workloads else f"workloads.{job.name}.selection"
            selection = job.config.selection
            policy = make_policy(selection.policy, selection.params, source=f"{path}: {where}")
            check_memory(job.config, float(policy.window_s), str(path), names=names)
    except ConfigError as exc:
        lines = exc.problems
        if devices is not None:
            lines = _as_option(lines, f"{path}: fleet.devices: ", "--devices", devices)
            lines = _as_option(lines, "--devices: ", "--devices", devices)
        if days is not None:
            lines = _as_option(lines, f"{path}: horizon.duration: ", "--days", days)
            lines = _as_option(lines, "--days: ", "--days", days)
        raise ConfigError(lines) from None
    return config


@contextmanager
def progress_bar(total: float, label: str) -> Iterator[Callable[[float], None]]:
    """A progress bar on stderr when it is a terminal; silent otherwise."""
    if not sys.stderr.isatty():
        yield lambda done: None
        return
    from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

    with Progress(
        TextColumn("{task.description}"), BarColumn(), TextColumn("{task.percentage:>3.0f}%"),
        TimeRemainingColumn(), transient=True,
    ) as bar:
        task = bar.add_task(label, total=total)
        yield lambda done: bar.update(task, completed=min(done, total))
