"""The ``telemetry`` command: synthetic telemetry drawn from a fleet file, written all or nothing.

The drawing and the files are :mod:`fleetsim.telemetry`'s; the folder is filled under a
temporary name and swapped in only when complete (:func:`fleetsim.output.atomic_folder`),
marked as a ``telemetry`` folder. The table libraries load inside the command only.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import typer

from ..config import example_path
from ..errors import FleetsimError
from .console import FileArg, SetOpt, fail, progress_bar, read_config, seed_option

__all__ = ["telemetry", "CAUTION"]

CAUTION = ("synthetic telemetry drawn from the fleet model, a stand-in for real logs and a measurement "
           "of no fleet; real telemetry needs the organisation's privacy review before it is collected or used, "
           "and the model should be fitted from it before it guides a change to a live fleet")
"""The line printed after every write, and kept in the folder's telemetry.json."""


def _period(text: str | None) -> float | None:
    """--snapshots-every as seconds (None: every check-in). Raises FleetsimError."""
    if text is None:
        return None
    from ..units import parse_duration

    try:
        seconds = parse_duration(text)
    except ValueError as exc:
        raise FleetsimError(f"--snapshots-every: {exc}") from None
    if not (math.isfinite(seconds) and seconds >= 0.001):
        raise FleetsimError(f"--snapshots-every: expected a duration of at least 1ms (got {text!r})")
    return seconds


def telemetry(
    file: Path | None = FileArg,
    out: Path = typer.Option(..., "--out", "-o", help="Folder to write: a new or empty one (an earlier "
                             "telemetry folder with --force).", show_default=False),
    devices: int | None = typer.Option(None, "--devices", help="Fleet size (overrides the file)."),
    days: float | None = typer.Option(None, "--days", help="Horizon length in days (overrides the file)."),
    seed: int = seed_option(0, "--seed", "Seed of every random stream (the fleet is the one a run with it draws)."),
    encoding: str = typer.Option("csv", "--format", help="File format: csv or parquet."),
    durations: str = typer.Option("exponential", "--durations", help="On-spell durations: exponential (the fleet "
                                  "model) or weibull:K (shape K, same mean; not the model)."),
    snapshots_every: str | None = typer.Option(None, "--snapshots-every", help="Mean time between kept check-in "
                                               "snapshots (a duration such as 1h). Default: every check-in.",
                                               show_default=False),
    overrides: list[str] = SetOpt,
    force: bool = typer.Option(False, "--force", help="Replace an earlier fleetsim output at --out (never a folder "
                               "fleetsim did not write)."),
) -> None:
    """Draw synthetic telemetry from the fleet file; write intervals, snapshots and traits to --out."""
    from ..output import atomic_folder, atomic_text, check_target
    from ..telemetry import FORMATS, iter_telemetry, parse_durations, write_telemetry

    counts = {"devices": 0, "intervals": 0, "snapshots": 0}
    encoding = encoding.lower()
    try:
        if encoding not in FORMATS:
            raise FleetsimError(f"--format: expected csv or parquet (got {encoding!r})")
        law = parse_durations(durations)
        every = _period(snapshots_every)
        config = read_config(file, overrides, devices, days)
        source = file if file is not None else example_path()
        label = f"--out {out}"
        check_target(out, "telemetry", force, [source], label)  # refuse before drawing, not after
        about = {"generator": "fleetsim telemetry", "fleet_file": str(source.resolve()), "seed": seed,
                 "devices": config.fleet.devices, "days": config.horizon.duration / 86400.0,
                 "durations": durations, "snapshots_every_s": every, "format": encoding, "caution": CAUTION}

        def fill(folder: Path) -> None:
            with progress_bar(config.fleet.devices, "drawing telemetry") as tick:
                def advance(chunk) -> None:
                    counts["devices"] += len(chunk.traits)
                    counts["intervals"] += len(chunk.intervals)
                    counts["snapshots"] += len(chunk.snapshots)
                    tick(counts["devices"])

                chunks = iter_telemetry(config, seed, durations=law, snapshots_every=every)
                write_telemetry(chunks, folder, encoding, on_chunk=advance)
            atomic_text(folder / "telemetry.json", json.dumps(about, indent=2) + "\n")

        atomic_folder(out, fill, kind="telemetry", force=force, inputs=[source], label=label,
                      notice=lambda line: typer.echo(line, err=True))
    except FleetsimError as exc:
        fail(exc)
    typer.echo(f"wrote {out}/intervals.{encoding} ({counts['intervals']:,} rows), snapshots.{encoding} "
               f"({counts['snapshots']:,} rows), traits.{encoding} ({counts['devices']:,} devices), telemetry.json")
    typer.echo(f"caution: {CAUTION}")
