"""The fleet participation report: ``report.html`` and ``report.md`` from a run folder.

The report reads only the run folder (summary.json, config.json, events.parquet and
tables/*.csv, as :func:`fleetsim.output.write_run` writes them) and answers, section by
section, the questions a team asks of a run; docs/report.md describes every section. A run
of several workloads gets one report: how they shared the fleet, then each workload's own
report from its run folder under ``workloads/``, then the caution. One set of settings run
under several seeds (a multi-seed run folder, or several run folders) gets the report of
their combined summary (:mod:`.seeds`): every figure's mean with its between-seed interval.
"""

from __future__ import annotations

import os
import uuid
import warnings
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path

from ..errors import FleetsimError
from .markdown import render_markdown, render_markdown_several
from .page import render_html, render_html_several
from .rundir import read_run_folder
from .sections import build_sections, build_several
from .seeds import build_seed_sections, is_seeds, read_seeds_summary, seeds_header
from .several import is_several, read_several_folder

__all__ = ["write_report", "render_report", "render_runs_report", "write_runs_report"]

_SEEDS_FOOTER = ("Every figure comes from the combined summary of the seeds (summary.json), as the tables show "
                 "it: each figure's mean over the seeds, its 95% Student t interval between seeds and the seeds "
                 "it rests on; each seed's own run folder holds its own figures.")


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
    if is_seeds(run_dir):
        return _render_seeds(read_seeds_summary(run_dir), Path(run_dir).resolve().name)
    if is_several(run_dir):
        return _render_several(run_dir)
    folder = read_run_folder(run_dir)
    with _quiet_glyphs():
        sections = build_sections(folder)
    name = folder.path.resolve().name
    version = _version()
    return (render_html(sections, folder.summary, name, version),
            render_markdown(sections, folder.summary, name, version))


def _render_seeds(combined: dict, name: str) -> tuple[str, str]:
    """The report of a combined summary of several seeds as (HTML, Markdown)."""
    sections = build_seed_sections(combined)
    header = seeds_header(combined)
    version = _version()
    return (render_html(sections, header, name, version, footer=_SEEDS_FOOTER),
            render_markdown(sections, header, name, version))


def _combined_runs(run_dirs: Sequence[str | Path]) -> dict:
    """The combined summary of several run folders of the same settings, each checked as the
    report checks any run folder. Raises FleetsimError (one line)."""
    from ..output.seeds import combine_runs

    if len(run_dirs) < 2:
        raise FleetsimError(f"{run_dirs[0] if run_dirs else 'RUN_DIR'}: a report over several runs needs at least "
                            "two run folders")
    for folder in run_dirs:
        if is_seeds(folder) or is_several(folder):
            what = "a multi-seed run folder" if is_seeds(folder) else "a run of several workloads"
            raise FleetsimError(f"{folder}: is {what}; a report over several runs takes ordinary run folders "
                                "of one workload")
        read_run_folder(folder)
    return combine_runs(run_dirs, [str(Path(f).resolve()) for f in run_dirs])


def render_runs_report(run_dirs: Sequence[str | Path], name: str = "several runs") -> tuple[str, str]:
    """The report over several run folders of the same settings under different seeds, as
    (HTML, Markdown); ``name`` is the folder the masthead names. Raises FleetsimError naming both
    folders and what differs when their settings differ."""
    combined = _combined_runs(run_dirs)
    return _render_seeds(combined, name)


def write_runs_report(run_dirs: Sequence[str | Path], out: str | Path, *, force: bool = False) -> tuple[Path, Path]:
    """Write the report over several run folders into the new folder ``out``, all or nothing:
    its combined summary.json, report.html and report.md (a folder of kind ``seeds``, which
    ``fleetsim report OUT`` renders again). ``force`` replaces an earlier fleetsim output.
    Raises FleetsimError."""
    import json

    from ..output import atomic_folder, check_target

    inputs = [Path(f) / "summary.json" for f in run_dirs]
    check_target(out, "seeds", force, inputs, f"--out {out}")  # refuse before reading, not after
    combined = _combined_runs(run_dirs)
    where = Path(out)
    page, markdown = _render_seeds(combined, Path(os.path.abspath(where)).name)

    def fill(folder: Path) -> None:
        (folder / "summary.json").write_text(json.dumps(combined, indent=2) + "\n", encoding="utf-8")
        (folder / "report.html").write_text(page, encoding="utf-8", newline="\n")
        (folder / "report.md").write_text(markdown, encoding="utf-8", newline="\n")

    atomic_folder(where, fill, kind="seeds", force=force, inputs=inputs, label=f"--out {out}")
    return where / "report.html", where / "report.md"


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
    if folder.is_dir() and (marker is None or marker["kind"] not in ("run", "seeds")):
        raise FleetsimError(f"{run_dir}: not a run folder written by 'fleetsim run' (no {MARKER} file of "
                            "kind run); nothing written")
    page, markdown = render_report(run_dir)
    html_path, md_path = folder / "report.html", folder / "report.md"
    _write_both([(html_path, page), (md_path, markdown)])
    return html_path, md_path
