"""The ``run``, ``check``, ``schema`` and ``policies`` commands.

``check`` and ``schema`` read only the fleet-file model: the simulation, the output writer
and their table libraries are imported inside ``run``, so these commands start at once.
"""

from __future__ import annotations

import json
from pathlib import Path

import typer

from ..config import config_schema, example_path
from ..errors import ConfigError, FleetsimError
from .console import MAX_SEED, FileArg, OptionValueError, SetOpt, fail, progress_bar, read_config, seed_option

__all__ = ["run", "check", "schema", "policies"]

MAX_SEEDS = 10_000
"""The most seeds one ``fleetsim run --seeds`` runs."""


def _seeds_in_range(value: int | None) -> int | None:
    """Option callback: --seeds is a whole number from 2 to :data:`MAX_SEEDS` (raises OptionValueError)."""
    if value is not None and not 2 <= value <= MAX_SEEDS:
        raise OptionValueError(f"expected a whole number of seeds from 2 to {MAX_SEEDS:,} (got {value})")
    return value


def run(
    file: Path | None = FileArg,
    out: Path = typer.Option(
        Path("out"), "--out", "-o",
        help="Output folder: a new or empty one, or an earlier fleetsim output with --force.",
    ),
    seed: int = seed_option(0, "--seed", "Seed of every random stream."),
    seeds: int | None = typer.Option(
        None, "--seeds", callback=_seeds_in_range,
        help="Run the same settings under N seeds (N >= 2; --seed S gives S to S+N-1): --out then holds "
             "seeds/SEED/ (a run folder each) and a combined summary.json with between-seed intervals.",
    ),
    days: float | None = typer.Option(None, "--days", help="Horizon length in days (overrides the file)."),
    devices: int | None = typer.Option(None, "--devices", help="Fleet size (overrides the file)."),
    overrides: list[str] = SetOpt,
    report: bool = typer.Option(False, "--report", help="Also write report.html and report.md."),
    replay: list[Path] = typer.Option(
        [], "--replay",
        help="Telemetry files or folders (interval logs, or check-in snapshots filled by a bridge; "
             "docs/telemetry.md) whose logged devices and signals drive the run instead of the fleet model.",
    ),
    force: bool = typer.Option(
        False, "--force", help="Replace an earlier fleetsim output at --out (never a folder fleetsim did not write)."
    ),
) -> None:
    """Simulate the fleet file and write summary.json, events.parquet and tables/ to --out."""
    from ..brief import render_summary
    from ..engine import simulate
    from ..output import check_target, write_run

    if seeds is not None:
        _run_seeds(file, out, seed, seeds, days, devices, overrides, report, replay, force)
        return
    try:
        config = read_config(file, overrides, devices, days)
        source = file if file is not None else example_path()
        label = f"--out {out}"
        check_target(out, "run", force, [source, *replay], label)  # refuse before simulating, not after
        logs = None
        if replay:
            config, logs = _replay_logs(file, overrides, days, replay, seed, config)
        with progress_bar(config.horizon.duration, "simulating") as tick:
            result = simulate(config, seed=seed, on_progress=tick, replay=logs)
        result.source = str(source.resolve())  # absolute: the summary names the file wherever it is read
        write_run(result, out, force=force, inputs=[source], label=label,
                  notice=lambda line: typer.echo(line, err=True))
        if report:
            from ..report import write_report

            write_report(out)
    except FleetsimError as exc:
        fail(exc)
    typer.echo(render_summary(result.summary))
    several = ", workloads/ (one run folder per workload)" if len(result.workloads) > 1 else ""
    typer.echo(f"wrote {out}/summary.json, events.parquet, tables/" + several
               + (", report.html, report.md" if report else ""))


def _run_seeds(file: Path | None, out: Path, first: int, count: int, days: float | None, devices: int | None,
               overrides: list[str], report: bool, replay: list[Path], force: bool) -> None:
    """``fleetsim run --seeds``: the settings under seeds first .. first + count - 1, written as a
    multi-seed run folder (:mod:`fleetsim.output.seeds`); progress over all seeds on a terminal."""
    from ..engine import simulate
    from ..output import check_target
    from ..output.run import fill_run
    from ..output.seeds import SEEDS, write_seeds

    try:
        if first + count - 1 > MAX_SEED:
            raise FleetsimError(f"--seeds: seeds {first} to {first + count - 1} pass the largest seed, 2**63 - 1; "
                                "choose a smaller --seed or fewer seeds")
        config = read_config(file, overrides, devices, days)
        source = file if file is not None else example_path()
        if len(config.jobs) > 1:
            raise FleetsimError(f"--seeds: {source}: a fleet file with several workloads is not run under several "
                                "seeds; run each seed with --seed")
        label = f"--out {out}"
        check_target(out, SEEDS, force, [source, *replay], label)  # refuse before simulating, not after
        horizon = float(config.horizon.duration)

        with progress_bar(count * horizon, f"simulating {count} seeds") as tick:
            def fill_seed(seed: int, folder: Path) -> None:
                settings, logs = config, None
                if replay:
                    settings, logs = _replay_logs(file, overrides, days, replay, seed, config)
                done = (seed - first) * horizon
                result = simulate(settings, seed=seed, on_progress=lambda t: tick(done + t), replay=logs)
                result.source = str(source.resolve())
                fill_run(result, folder)

            write_seeds(out, range(first, first + count), fill_seed, force=force, inputs=[source], label=label,
                        notice=lambda line: typer.echo(line, err=True))
        if report:
            from ..report import write_report

            write_report(out)
        combined = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    except FleetsimError as exc:
        fail(exc)
    typer.echo(_seeds_brief(combined))
    typer.echo(f"wrote {out}/summary.json (between-seed intervals), {SEEDS}/{first}/ to {SEEDS}/{first + count - 1}/ "
               "(one run folder per seed)" + (", report.html, report.md" if report else ""))


_BRIEF = (("rounds.committed_per_hour", "committed rounds per hour", "{:.3g}"),
          ("waste.compute_fraction", "share of device compute wasted", "{:.1%}"),
          ("bias.coverage", "devices that ever reported", "{:.1%}"))


def _seeds_brief(combined: dict) -> str:
    """A few headline figures of a multi-seed run with their between-seed intervals, and the caution."""
    figures = {tuple(f["path"]): f for f in combined["figures"]}
    seeds = combined["seeds"]
    lines = [f"{combined['scenario']}", f"  seeds {seeds[0]} to {seeds[-1]}, config {combined['config_hash']}, "
             f"{combined['devices']:,} devices; 95% Student t intervals between seeds"]
    for key, words, form in _BRIEF:
        f = figures.get(tuple(key.split(".")))
        if f is None or f["mean"] is None:
            lines.append(f"{words}: n/a")
            continue
        spread = f" ({form.format(f['low'])} to {form.format(f['high'])})" if f["low"] is not None else ""
        lines.append(f"{words}: {form.format(f['mean'])}{spread}, {f['seeds']} seeds")
    lines.append(f"caution: {combined['caution']}")
    return "\n".join(lines)


def _replay_logs(file: Path | None, overrides: list[str], days: float | None, paths: list[Path], seed: int,
                 config):
    """The fleet file read again for the logged devices, and their :class:`fleetsim.replay.Replay`:
    from interval logs, or from snapshots filled by the bridge (:mod:`fleetsim.bridge`)."""
    from ..bridge import bridge_intervals
    from ..replay import replay_from_frame
    from ..telemetry.read import read_telemetry

    telemetry = read_telemetry(paths)
    frame = telemetry.intervals
    if frame is None:
        if telemetry.snapshots is None:
            raise FleetsimError(f"--replay {paths[0]}: holds no interval logs or snapshots (docs/telemetry.md)")
        frame = bridge_intervals(telemetry.snapshots, config, seed)
    count = frame["device_id"].nunique()
    config = read_config(file, [*overrides, f"fleet.devices={count}"], None, days)
    return config, replay_from_frame(frame, config.horizon.start.timestamp())


def check(
    file: Path | None = typer.Argument(
        None, help="Fleet file (YAML); with --stress, the fleet to check it against (default: the bundled example).",
        show_default=False,
    ),
    overrides: list[str] = SetOpt,
    stress: Path | None = typer.Option(
        None, "--stress", help="Check this stress file (a 'disruptions:' list) against the fleet file instead."
    ),
) -> None:
    """Validate a fleet file (or a stress file with --stress): exit 0, or one line per problem and exit 2."""
    try:
        if stress is not None:
            _check_stress(stress, file, overrides)
            return
        if file is None:
            raise ConfigError(["file: missing; see --help"])
        config = read_config(file, overrides)
    except FleetsimError as exc:
        fail(exc)
    fleet = config.fleet
    typer.echo(
        f"{file}: ok ({fleet.devices:,} devices, {len(fleet.device_types)} device types, "
        f"{len(fleet.regions)} regions, policy {config.selection.policy})"
    )


def _check_stress(stress: Path, file: Path | None, overrides: list[str]) -> None:
    """Validate the stress file's disruptions against the fleet file (default: the bundled
    example), alone and added to the fleet's own; print one ``ok`` line. Raises ConfigError."""
    from ..study.settings import FleetFile  # the study's reader of stress files, the one place of its rules

    fleet = file if file is not None else example_path()
    read_config(fleet, overrides)  # the fleet file's own problems, worded as for check FILE
    base = FleetFile.read(fleet, overrides)
    stressed = base.with_stress(stress)
    stressed.config()  # the stress events added to the fleet's own disruptions still validate
    count = len(stressed.raw["disruptions"]) - len(base.raw.get("disruptions") or [])
    typer.echo(f"{stress}: ok ({count} disruption{'s' if count != 1 else ''}, checked against {fleet})")


def schema() -> None:
    """Print the JSON Schema of the fleet file format."""
    typer.echo(json.dumps(config_schema(), indent=2))


def policies() -> None:
    """List the built-in selection policies."""
    from ..policies import BUILTIN_POLICIES

    for name, cls in BUILTIN_POLICIES.items():
        doc = (cls.__doc__ or "").strip().split("\n\n")[0].replace("\n", " ")
        typer.echo(f"{name:<14} {' '.join(doc.split())}")
