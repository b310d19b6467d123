"""The ``fleetsim report`` command: renders a run folder (:mod:`fleetsim.report`)."""

from __future__ import annotations

from pathlib import Path

import typer

from ..errors import FleetsimError
from .console import fail

__all__ = ["report"]


def report(
    run_dirs: list[Path] = typer.Argument(
        ..., help="A run folder written by 'fleetsim run --out' (a multi-seed one too), or several run folders "
                  "of the same settings under different seeds (with --out).", show_default=False),
    out: Path | None = typer.Option(
        None, "--out", "-o", help="With several run folders: a new folder for their report and combined "
                                  "summary.json (an earlier fleetsim output only with --force)."),
    force: bool = typer.Option(False, "--force", help="With --out: replace an earlier fleetsim output there."),
) -> None:
    """Write report.html (one self-contained page) and report.md into RUN_DIR.

    A run of several workloads gets one report of them all: how they shared the fleet, then
    each workload's own report. A multi-seed run folder ('fleetsim run --seeds'), or several
    run folders of the same settings, get the report across seeds: every figure's mean with
    its between-seed interval and the seeds it rests on.
    """
    from ..report import write_report, write_runs_report  # here: the report's libraries load only for this command

    try:
        if len(run_dirs) > 1:
            if out is None:
                raise FleetsimError(f"--out: missing; a report over {len(run_dirs)} run folders needs a new folder "
                                    "for report.html, report.md and their combined summary.json")
            html_path, md_path = write_runs_report(run_dirs, out, force=force)
        else:
            if out is not None:
                raise FleetsimError(f"--out {out}: only with several run folders; the report of {run_dirs[0]} "
                                    "goes into that folder")
            html_path, md_path = write_report(run_dirs[0])
    except FleetsimError as exc:
        fail(exc)
    typer.echo(f"wrote {html_path} and {md_path}")
