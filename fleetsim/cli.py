"""The ``fleetsim`` command: a thin shell over the public API.

Every expected failure is a FleetsimError: printed as ``error: <message>`` (one line per
problem) with exit status 2, never a traceback.
"""

from __future__ import annotations

import json
import math
import sys
import unicodedata
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import typer

from .config import Config, check_memory, config_schema, example_path, load_config
from .engine import simulate
from .errors import ConfigError, FleetsimError
from .output import check_target, write_run
from .policies import BUILTIN_POLICIES, make_policy

try:  # typer vendors its own copy of click from 0.22 on
    from typer._click import exceptions as _usage
except ImportError:  # pragma: no cover - older typer on click
    import click.exceptions as _usage  # type: ignore[no-redef]

from typer.core import TyperGroup

_SEED_OPTIONS = ("seed", "first_seed")
_MAX_SEED = 2**63 - 1


def _one_line(text: str) -> str:
    """``text`` with every character that could break or reorder a terminal line escaped."""
    return "".join(
        char if char == " " or (char.isprintable() and unicodedata.category(char) not in ("Cf", "Zl", "Zp"))
        else char.encode("unicode_escape").decode("ascii")
        for char in text
    )


def _usage_line(exc: Exception) -> str:
    """One ``error:`` line for a command-line usage error: the option, what was wrong, the value."""
    if isinstance(exc, _usage.NoSuchOption):
        near = f"; did you mean {', '.join(sorted(exc.possibilities))}?" if exc.possibilities else ""
        return f"{exc.option_name}: unknown option{near} (see --help)"
    if isinstance(exc, _usage.BadParameter):
        param = exc.param
        hint = exc.param_hint or (param.opts[0] if param is not None and getattr(param, "opts", None) else None)
        hint = hint or (getattr(param, "human_readable_name", None) or "option")
        if isinstance(hint, (list, tuple)):
            hint = " / ".join(hint)
        hint = str(hint).strip('"\'')
        if isinstance(exc, _usage.MissingParameter):
            return f"{hint}: missing; see --help"
        cause: Any = exc.__cause__
        errors = cause.errors() if hasattr(cause, "errors") else []
        if errors:
            kind = "a whole number" if "integer" in errors[0]["msg"] else "a number"
            return f"{hint}: expected {kind} (got {errors[0]['input']!r})"
        return f"{hint}: {exc.format_message()}"
    if isinstance(exc, _usage.BadOptionUsage):
        return f"{exc.option_name}: {exc.format_message()}"
    return str(getattr(exc, "format_message", exc.__str__)())


def _check_seeds(callback: Callable[..., Any]) -> Callable[..., Any]:
    """Wrap a command so that seed options are whole numbers from 0 to 2**63 - 1."""
    def checked(*args: Any, **kwargs: Any) -> Any:
        for key in _SEED_OPTIONS:
            value = kwargs.get(key)
            if value is not None and not 0 <= value <= _MAX_SEED:
                option = "--" + key.replace("_", "-")
                typer.echo(f"error: {option}: expected a whole number from 0 to 2**63 - 1 (got {value})", err=True)
                raise typer.Exit(2)
        return callback(*args, **kwargs)

    checked._seeds_checked = True  # type: ignore[attr-defined]
    return checked


class _Commands(TyperGroup):
    """The command group: usage errors are ``error:`` lines with exit status 2, like file errors."""

    def get_command(self, ctx: Any, cmd_name: str) -> Any:
        command = super().get_command(ctx, cmd_name)
        if command is not None and command.callback is not None and not hasattr(command.callback, "_seeds_checked") \
                and any(p.name in _SEED_OPTIONS for p in command.params):
            command.callback = _check_seeds(command.callback)
        return command

    def main(self, args: Any = None, prog_name: str | None = None, complete_var: str | None = None,  # type: ignore[override]
             standalone_mode: bool = True, **extra: Any) -> Any:
        try:
            code = super().main(args=args, prog_name=prog_name, complete_var=complete_var,
                                standalone_mode=False, **extra)
            code = code if isinstance(code, int) else 0
        except _usage.NoArgsIsHelpError as exc:
            typer.echo(exc.format_message())
            code = 0
        except _usage.UsageError as exc:
            typer.echo(f"error: {_one_line(_usage_line(exc))}", err=True)
            code = 2
        except _usage.ClickException as exc:
            typer.echo(f"error: {_one_line(exc.format_message())}", err=True)
            code = exc.exit_code
        except typer.Abort:
            typer.echo("Aborted!", err=True)
            code = 1
        if standalone_mode:
            sys.exit(code)
        return code


app = typer.Typer(
    cls=_Commands,
    name="fleetsim",
    help="Simulate a device fleet taking part in Federated Averaging rounds.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)

FileArg = typer.Argument(None, help="Fleet file (YAML). Default: the bundled Inkwren example.", show_default=False)
SetOpt = typer.Option([], "--set", help="Override a key of the file: key.path=value (repeatable).")


def fail(error: FleetsimError) -> None:
    """Print ``error`` as ``error:`` lines on stderr (each one line, control characters
    escaped) and exit with status 2."""
    lines = error.problems if isinstance(error, ConfigError) else str(error).splitlines() or [repr(error)]
    for line in lines:
        typer.echo(f"error: {_one_line(line)}", err=True)
    raise typer.Exit(2)


MAX_DEVICES = 100_000_000


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
        # An unimportable plug-in fails now, naming the file.
        policy = make_policy(config.selection.policy, config.selection.params, source=f"{path}: selection")
        check_memory(config, float(policy.window_s), str(path), names=names)
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


def _pct(x: Any) -> str:
    return "n/a" if x is None else f"{100 * x:.1f}%"


def render_summary(summary: dict[str, Any]) -> str:
    """The short plain-text summary ``fleetsim run`` prints."""
    r, w, b = summary["rounds"], summary["waste"], summary["bias"]
    d = r["duration_s"]
    lines = [
        f"{summary['scenario']}",
        f"  seed {summary['seed']}, config {summary['config_hash']}, {summary['devices']:,} devices, "
        f"{summary['simulated_hours']:g} simulated hours from {summary['horizon_start']}, policy {summary['policy']}",
        f"rounds: {r['committed']} committed of {r['attempted']} ({r['committed_per_hour']:.2f} per hour); "
        f"{r['failed']} failed, {r['abandoned']} abandoned"
        + (f", {r['outage']} lost to outages" if r["outage"] else ""),
    ]
    if d["p50"] is not None:
        lines.append(f"  committed round duration p50 {d['p50']:.0f}s, p90 {d['p90']:.0f}s, p99 {d['p99']:.0f}s")
    lines.append(
        f"straggler waste: {_pct(w['compute_fraction'])} of compute, {_pct(w['bytes_fraction'])} of bytes, "
        f"{_pct(w['energy_fraction'])} of energy"
    )
    causes = sorted(w["by_cause"].items(), key=lambda kv: -kv[1]["compute_s"])[:4]
    if causes:
        total = sum(v["compute_s"] for v in w["by_cause"].values()) or 1.0
        shares = ", ".join(f"{k} {100 * v['compute_s'] / total:.0f}%" for k, v in causes)
        lines.append(f"  largest causes (compute): {shares}")
    gini = "n/a" if b["gini"] is None else f"{b['gini']:.2f}"
    p_value = b["chi_square_p"]
    chi_p = "n/a" if p_value is None else ("< 1e-300" if p_value == 0 else f"{p_value:.3g}")
    lines.append(f"participation: coverage {_pct(b['coverage'])} of devices, Gini {gini}, chi-square p {chi_p}")
    lines.append(f"  {'device type':<18} {'fleet':>7} {'eligible':>9} {'reports':>8} {'weight':>7} {'ratio':>6}")
    for name, v in b["by_device_type"].items():
        ratio = "n/a" if v["representation_ratio"] is None else f"{v['representation_ratio']:.2f}"
        lines.append(
            f"  {name:<18} {_pct(v['fleet_share']):>7} {_pct(v['eligible_share']):>9} "
            f"{_pct(v['report_share']):>8} {_pct(v['weight_share']):>7} {ratio:>6}"
        )
    lines.append(f"caution: {summary['caution']}")
    return "\n".join(lines)


@app.command()
def run(
    file: Path | None = FileArg,
    out: Path = typer.Option(
        Path("out"), "--out", "-o",
        help="Output folder: a new or empty one, or an earlier fleetsim output with --force.",
    ),
    seed: int = typer.Option(0, "--seed", help="Seed of every random stream."),
    days: float | None = typer.Option(None, "--days", help="Horizon length in days (overrides the file)."),
    devices: int | None = typer.Option(None, "--devices", help="Fleet size (overrides the file)."),
    overrides: list[str] = SetOpt,
    report: bool = typer.Option(False, "--report", help="Also write report.html and report.md."),
    force: bool = typer.Option(
        False, "--force", help="Replace an earlier fleetsim output at --out (never a folder fleetsim did not write)."
    ),
) -> None:
    """Simulate the fleet file and write summary.json, events.parquet and tables/ to --out."""
    try:
        config = read_config(file, overrides, devices, days)
        source = file if file is not None else example_path()
        label = f"--out {out}"
        check_target(out, "run", force, [source], label)  # refuse before simulating, not after
        with progress_bar(config.horizon.duration, "simulating") as tick:
            result = simulate(config, seed=seed, on_progress=tick)
        result.source = str(source)
        write_run(result, out, force=force, inputs=[source], label=label,
                  notice=lambda line: typer.echo(line, err=True))
        if report:
            from .report import write_report

            write_report(out)
    except FleetsimError as exc:
        fail(exc)
    typer.echo(render_summary(result.summary))
    typer.echo(f"wrote {out}/summary.json, events.parquet, tables/" + (", report.html, report.md" if report else ""))


@app.command()
def check(
    file: Path = typer.Argument(..., help="Fleet file (YAML)."),
    overrides: list[str] = SetOpt,
) -> None:
    """Validate a fleet file: exit 0, or one line per problem and exit 2."""
    try:
        config = read_config(file, overrides)
    except FleetsimError as exc:
        fail(exc)
    fleet = config.fleet
    typer.echo(
        f"{file}: ok ({fleet.devices:,} devices, {len(fleet.device_types)} device types, "
        f"{len(fleet.regions)} regions, policy {config.selection.policy})"
    )


@app.command()
def schema() -> None:
    """Print the JSON Schema of the fleet file format."""
    typer.echo(json.dumps(config_schema(), indent=2))


@app.command()
def policies() -> None:
    """List the built-in selection policies."""
    for name, cls in BUILTIN_POLICIES.items():
        doc = (cls.__doc__ or "").strip().split("\n\n")[0].replace("\n", " ")
        typer.echo(f"{name:<14} {' '.join(doc.split())}")


# Commands of the report and study packages register themselves here.
def _register_extensions() -> None:
    import importlib

    for module in ("fleetsim.report.commands", "fleetsim.study.commands"):
        try:
            importlib.import_module(module).register(app)
        except ModuleNotFoundError as exc:
            if exc.name is None or not module.startswith(exc.name):
                raise


_register_extensions()


def main() -> None:
    app()


if __name__ == "__main__":
    main()
