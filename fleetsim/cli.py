"""The ``fleetsim`` command: a thin shell over the public API.

Every expected failure is a FleetsimError: printed as ``error: <message>`` (one line per
problem) with exit status 2, never a traceback.
"""

from __future__ import annotations

import json
import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import typer

from .config import Config, config_schema, example_path, load_config
from .engine import simulate
from .errors import ConfigError, FleetsimError
from .output import write_run
from .policies import BUILTIN_POLICIES, make_policy

app = typer.Typer(
    name="fleetsim",
    help="Simulate a device fleet taking part in Federated Averaging rounds.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)

FileArg = typer.Argument(None, help="Fleet file (YAML). Default: the bundled Inkwren example.", show_default=False)
SetOpt = typer.Option([], "--set", help="Override a key of the file: key.path=value (repeatable).")


def fail(error: FleetsimError) -> None:
    lines = error.problems if isinstance(error, ConfigError) else str(error).splitlines() or [repr(error)]
    for line in lines:
        typer.echo(f"error: {line}", err=True)
    raise typer.Exit(2)


def read_config(
    file: Path | None, overrides: list[str], devices: int | None = None, days: float | None = None
) -> Config:
    """Load the fleet file with --set, --devices and --days applied (all validated alike)."""
    path = file if file is not None else example_path()
    extra = list(overrides)
    if devices is not None:
        extra.append(f"fleet.devices={devices}")
    if days is not None:
        extra.append(f"horizon.duration={days}d")
    config = load_config(path, extra)
    # An unimportable plug-in fails now, naming the file.
    make_policy(config.selection.policy, config.selection.params, source=f"{path}: selection")
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
    out: Path = typer.Option(Path("out"), "--out", "-o", help="Output folder (replaced whole)."),
    seed: int = typer.Option(0, "--seed", help="Seed of every random stream."),
    days: float | None = typer.Option(None, "--days", help="Horizon length in days (overrides the file)."),
    devices: int | None = typer.Option(None, "--devices", help="Fleet size (overrides the file)."),
    overrides: list[str] = SetOpt,
    report: bool = typer.Option(False, "--report", help="Also write report.html and report.md."),
) -> None:
    """Simulate the fleet file and write summary.json, events.parquet and tables/ to --out."""
    try:
        config = read_config(file, overrides, devices, days)
        with progress_bar(config.horizon.duration, "simulating") as tick:
            result = simulate(config, seed=seed, on_progress=tick)
        result.source = str(file if file is not None else example_path())
        write_run(result, out)
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
