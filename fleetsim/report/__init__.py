"""The fleet participation report: ``report.html`` and ``report.md`` from a run folder.

The report reads only the run folder (summary.json, config.json, events.parquet and
tables/*.csv, as :func:`fleetsim.output.write_run` writes them) and answers, section by
section, the questions a team asks of a run; docs/report.md describes every section. A run
of several workloads gets one report: how they shared the fleet, then each workload's own
report from its run folder under ``workloads/``, then the caution.
"""

from __future__ import annotations

import os
import uuid
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from ..errors import FleetsimError
from .markdown import render_markdown, render_markdown_several
from .page import render_html, render_html_several
from .rundir import read_run_folder
from .sections import build_sections, build_several
from .several import is_several, read_several_folder

__all__ = ["write_report", "render_report"]


def _version() -> str:
    from .. import __version__

    return __version__


def render_report(run_dir: str | Path) -> tuple[str, str]:
    """The report of a run folder as (HTML, Markdown) text, written nowhere.

    A run of several workloads (summary.json with ``sharing`` and ``workloads``) opens with
    how the workloads shared the fleet, then holds each workload's whole report, read from
    its run folder under ``workloads/``. Raises FleetsimError when ``run_dir`` is not a
    readable run folder.
    """
    if is_several(run_dir):
        return _render_several(run_dir)
    folder = read_run_folder(run_dir)
    with _quiet_glyphs():
        sections = build_sections(folder)
    name = folder.path.resolve().name
    version = _version()
    return (render_html(sections, folder.summary, name, version),
            render_markdown(sections, folder.summary, name, version))


def _render_several(run_dir: str | Path) -> tuple[str, str]:
    """The report of a run folder of several workloads as (HTML, Markdown)."""
    folder = read_several_folder(run_dir)
    with _quiet_glyphs():
        opening, parts, closing = build_several(folder)
    name = folder.path.resolve().name
    version = _version()
    return (render_html_several(opening, parts, closing, folder.summary, name, version),
            render_markdown_several(opening, parts, closing, folder.summary, name, version))


@contextmanager
def _quiet_glyphs() -> Iterator[None]:
    with warnings.catch_warnings():
        # A name with a character the figure font lacks is drawn as a box in the figure (the
        # tables beside it show it whole); that is not worth a warning per glyph.
        warnings.filterwarnings("ignore", message=r"Glyph \d+ .*missing from font", category=UserWarning)
        yield


def _write_both(targets: list[tuple[Path, str]]) -> None:
    """Write each text to a temporary file beside its target, then rename them all into place."""
    temps: list[Path] = []
    try:
        for target, text in targets:
            tmp = target.with_name(f".{target.name}.{uuid.uuid4().hex}.partial")
            temps.append(tmp)
            with open(tmp, "x", encoding="utf-8", newline="\n") as handle:
                handle.write(text)
        for (target, _), tmp in zip(targets, temps, strict=True):
            os.replace(tmp, target)
    except OSError as exc:
        raise FleetsimError(f"{targets[0][0].parent}: cannot write the report ({exc.strerror or exc})") from None
    finally:
        for tmp in temps:
            tmp.unlink(missing_ok=True)


def write_report(run_dir: str | Path) -> tuple[Path, Path]:
    """Write ``report.html`` and ``report.md`` into the run folder; return their paths.

    Both are built in memory first and each is renamed into place from a temporary file, so
    a failure never leaves a half-written report. Only a folder carrying the marker of a run
    (:data:`fleetsim.output.MARKER`, written by ``fleetsim run``) is written to. Raises
    FleetsimError when ``run_dir`` is not such a readable run folder or the files cannot be
    written.
    """
    from ..output import MARKER, read_marker

    folder = Path(run_dir)
    marker = read_marker(folder) if folder.is_dir() else None
    if folder.is_dir() and (marker is None or marker["kind"] != "run"):
        raise FleetsimError(f"{run_dir}: not a run folder written by 'fleetsim run' (no {MARKER} file of "
                            "kind run); nothing written")
    page, markdown = render_report(run_dir)
    html_path, md_path = folder / "report.html", folder / "report.md"
    _write_both([(html_path, page), (md_path, markdown)])
    return html_path, md_path
