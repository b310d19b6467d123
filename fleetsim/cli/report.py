"""The ``fleetsim report`` command: renders a run folder (:mod:`fleetsim.report`)."""

from __future__ import annotations

from pathlib import Path

import typer

from ..errors import FleetsimError
from .console import fail

__all__ = ["report"]


def report(
    run_dir: Path = typer.Argument(..., help="A run folder written by 'fleetsim run --out'.", show_default=False),
) -> None:
    """Write report.html (one self-contained page) and report.md into RUN_DIR.

    A run of several workloads gets one report of them all: how they shared the fleet, then
    each workload's own report.
    """
    from ..report import write_report  # imported here: the report's libraries load only for this command

    try:
        html_path, md_path = write_report(run_dir)
    except FleetsimError as exc:
        fail(exc)
    typer.echo(f"wrote {html_path} and {md_path}")
