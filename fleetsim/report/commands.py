"""The ``fleetsim report`` command (registered on the CLI by fleetsim.cli)."""

from __future__ import annotations

from pathlib import Path

import typer

from ..errors import FleetsimError

__all__ = ["register"]


def report(
    run_dir: Path = typer.Argument(..., help="A run folder written by 'fleetsim run --out'.", show_default=False),
) -> None:
    """Write report.html (one self-contained page) and report.md into RUN_DIR."""
    from . import write_report

    try:
        html_path, md_path = write_report(run_dir)
    except FleetsimError as exc:
        from ..cli import fail  # imported here: fleetsim.cli imports this module while it loads

        fail(exc)
    typer.echo(f"wrote {html_path} and {md_path}")


def register(app: typer.Typer) -> None:
    """Add the ``report`` command to ``app``."""
    app.command("report")(report)
