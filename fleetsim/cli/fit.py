"""The ``fit`` command: estimate a fleet file from telemetry (docs/fit.md).

Reads the logs (fleetsim.telemetry), holds out a share of the devices by a hash of their id,
fits the rest (fleetsim.fit), checks the fitted fleet against the held-out devices when the
goodness-of-fit checks are installed, and writes the fleet file, its side file of estimates
and the figures, each through a temporary file beside its target. Nothing is written until
everything is computed; a file fleetsim did not write is never replaced.
"""

from __future__ import annotations

import io
import json
import math
import os
import shutil
import tempfile
from pathlib import Path
from typing import Any

import typer

from ..config import WEEKDAYS, example_path
from ..errors import ConfigError, FleetsimError
from .console import fail, progress_bar

__all__ = ["fit", "CAUTION", "SIDE_SUFFIX", "FIGURES_SUFFIX", "WRITTEN_BY"]

CAUTION = ("a fitted fleet is only as good as its logs (their devices, weeks and gaps); it is a model: check it "
           "against held-out telemetry and follow your organisation's review before it changes a live fleet")
SIDE_SUFFIX = ".fit.json"
FIGURES_SUFFIX = ".fit"
WRITTEN_BY = "fleetsim fit"
_SHOWN_WARNINGS = 20


def _weekends(specs: list[str]) -> dict[str, frozenset[int]]:
    """``REGION=day,day`` options as region -> ISO day numbers (``REGION=`` for no weekend)."""
    out: dict[str, frozenset[int]] = {}
    for spec in specs:
        region, sep, days = spec.partition("=")
        if not sep or not region.strip():
            raise FleetsimError(f"--weekend-days: expected REGION=day,day (got {spec!r})")
        names = [d.strip().lower() for d in days.split(",") if d.strip()]
        for name in names:
            if name not in WEEKDAYS:
                raise FleetsimError(f"--weekend-days: {region}: unknown day {name!r}; expected {', '.join(WEEKDAYS)}"
                                    f" (got {spec!r})")
        out[region.strip()] = frozenset(WEEKDAYS.index(n) + 1 for n in names)
    return out


def _ours_yaml(path: Path) -> bool:
    from ..fit import FIT_HEADER

    try:
        with open(path, encoding="utf-8") as stream:
            return stream.readline().rstrip("\n") == FIT_HEADER
    except (OSError, UnicodeError):
        return False


def _ours_json(path: Path) -> bool:
    try:
        return json.loads(path.read_text(encoding="utf-8")).get("written_by") == WRITTEN_BY
    except (OSError, UnicodeError, ValueError, AttributeError):
        return False


def _check_targets(out: Path, force: bool, inputs: list[Path]) -> None:
    """Refuse, before any work, an output that would replace a file fleetsim fit did not
    write, or one it did without --force, or an input."""
    side, figures = _side_paths(out)
    for source in inputs:
        if source.exists() and any(p.exists() and os.path.samefile(p, source) for p in (out, side)):
            raise FleetsimError(f"--out {out}: is one of the inputs ({source}); choose another file")
    checks = [(out, _ours_yaml, "a fleet file fleetsim fit did not write"),
              (side, _ours_json, "a file fleetsim fit did not write")]
    for path, ours, what in checks:
        if path.is_dir():
            raise FleetsimError(f"--out {out}: {path} is a folder; choose another file")
        if path.exists() and not ours(path):
            raise FleetsimError(f"--out {out}: {path} exists and is {what}; refused (choose another file)")
        if path.exists() and not force:
            raise FleetsimError(f"--out {out}: {path} exists; add --force to replace an earlier fit")
    if figures.exists():
        if not figures.is_dir() or any(not f.name.endswith(".png") for f in figures.iterdir()):
            raise FleetsimError(f"--out {out}: {figures} exists and is not a figure folder fleetsim fit wrote; refused")
        if not force:
            raise FleetsimError(f"--out {out}: {figures} exists; add --force to replace an earlier fit")


def _side_paths(out: Path) -> tuple[Path, Path]:
    return out.with_name(out.name + SIDE_SUFFIX), out.with_name(out.name + FIGURES_SUFFIX)


def _read_template(template: Path | None) -> dict[str, Any]:
    from ..config import build_config, read_yaml

    path = template if template is not None else example_path()
    raw = read_yaml(path)
    if not isinstance(raw, dict):
        raise ConfigError([f"{path}: expected a mapping of sections at the top level (got {type(raw).__name__})"])
    build_config(raw, source=str(path))  # a template must itself be a valid fleet file
    return raw


def _read_logs(logs: list[Path]) -> Any:
    try:
        from ..telemetry import read_telemetry
    except ImportError:
        raise FleetsimError("fit: the telemetry reader (fleetsim.telemetry.read_telemetry) is not installed in "
                            "this build; cannot read logs") from None
    return read_telemetry(logs)


def _split(telemetry: Any, fraction: float) -> tuple[dict[str, Any], list[str], int]:
    """The fit set's frames, the held-out device ids and the number of devices."""
    from ..fit import device_table, held_out_mask

    table = device_table(telemetry.intervals, telemetry.snapshots)
    held = held_out_mask(table["device_id"], fraction)
    held_ids = set(table["device_id"][held])
    if held.all():
        raise FleetsimError(f"--held-out {fraction:g}: every one of the {len(table)} devices is held out; nothing "
                            "left to fit")
    frames = {}
    for key in ("intervals", "snapshots", "traits"):
        frame = getattr(telemetry, key, None)
        frames[key] = None if frame is None else frame[~frame["device_id"].astype(str).isin(held_ids)]
    return frames, sorted(held_ids), len(table)


_ESTIMATION_NOTE = ("the checks take the fitted values as exact, so where cells are thin (few devices per type "
                    "and region, pooled hours) the fit's own estimation noise can be enough to reject "
                    "(docs/fit.md, 'Limits'); before reading a rejection as misfit, see whether it stays with more "
                    "devices or weeks of logs")


def _goodness(fleet: dict[str, Any], telemetry: Any, held_out: list[str]) -> tuple[list[str], dict, dict]:
    """The goodness-of-fit report's lines, figures (name -> PNG bytes) and dict, if available."""
    if not held_out:
        return ["goodness of fit: no held-out devices (--held-out 0); not checked"], {}, {}
    try:
        from ..fit.goodness import goodness_of_fit
    except ImportError:
        return ["goodness of fit: fleetsim.fit.goodness is not installed in this build; not checked"], {}, {}
    from ..config import build_config

    report = goodness_of_fit(build_config(fleet, source="fitted fleet"), telemetry, held_out)
    if any(c.verdict == "rejected" for c in report.checks):
        report.notes.append(_ESTIMATION_NOTE)
    figures = {}
    for name, figure in sorted(report.figures.items()):
        buffer = io.BytesIO()
        figure.savefig(buffer, format="png", dpi=110)
        figures[name] = buffer.getvalue()
    data = report.to_dict() if hasattr(report, "to_dict") else {}
    return list(report.lines()), figures, data


def _clean(value: Any) -> Any:
    """``value`` as plain JSON: numpy numbers as Python ones, non-finite numbers as null."""
    if isinstance(value, dict):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    if hasattr(value, "item") and not isinstance(value, (str, bytes)):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _write_all(out: Path, text: str, side: dict[str, Any], figures: dict[str, bytes]) -> None:
    """Write the figures (a folder swapped in whole), the side file, then the fleet file."""
    from ..output import atomic_text

    side_path, folder = _side_paths(out)
    if figures:
        out.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{folder.name}.partial-", dir=out.parent))
        try:
            mask = os.umask(0)
            os.umask(mask)
            os.chmod(tmp, 0o777 & ~mask)  # mkdtemp makes the folder private; outputs are readable like the rest
            for name, blob in figures.items():
                (tmp / f"{name}.png").write_bytes(blob)
            if folder.exists():
                shutil.rmtree(folder)
            os.replace(tmp, folder)
        except OSError as exc:
            shutil.rmtree(tmp, ignore_errors=True)
            raise FleetsimError(f"{folder}: cannot write ({exc.strerror or exc})") from None
    atomic_text(side_path, json.dumps(side, indent=1, allow_nan=False) + "\n")
    atomic_text(out, text)


def fit(
    logs: list[Path] = typer.Argument(..., help="Telemetry files (CSV or Parquet; intervals, snapshots, traits).",
                                      show_default=False),
    out: Path = typer.Option(..., "--out", "-o", help="Fleet file to write (YAML); also FILE.fit.json and FILE.fit/."),
    template: Path | None = typer.Option(
        None, "--template", help="Fleet file whose workload, rounds and selection are copied (default: the example)."),
    held_out: float = typer.Option(0.2, "--held-out", help="Share of devices held out for the goodness of fit."),
    weekend_days: list[str] = typer.Option(
        [], "--weekend-days", help="A region's weekend: REGION=day,day (repeatable; REGION= for none)."),
    signals_from: str = typer.Option("auto", "--signals-from",
                                     help="Fit the signals from: auto (intervals if given), intervals or snapshots."),
    force: bool = typer.Option(False, "--force", help="Replace an earlier fit at --out (never another file)."),
) -> None:
    """Estimate a fleet file from telemetry by maximum likelihood, with 95% intervals."""
    try:
        text, lines = _run(logs, out, template, held_out, weekend_days, signals_from, force)
    except FleetsimError as exc:
        fail(exc)
    for line in lines:
        typer.echo(line)
    typer.echo(f"wrote {out}, {out.name}{SIDE_SUFFIX}" + (f", {out.name}{FIGURES_SUFFIX}/" if text else ""))
    typer.echo(f"caution: {CAUTION}")


def _run(logs: list[Path], out: Path, template: Path | None, held_out: float, weekend_days: list[str],
         signals_from: str, force: bool) -> tuple[bool, list[str]]:
    """Everything ``fit`` does; returns whether figures were written and the lines to print."""
    from .. import __version__
    from ..config import build_config, load_yaml_text
    from ..fit import fit_fleet, render_yaml

    if not (math.isfinite(held_out) and 0.0 <= held_out < 1.0):
        raise FleetsimError(f"--held-out: expected a share from 0 to below 1 (got {held_out:g})")
    if signals_from not in ("auto", "intervals", "snapshots"):
        raise FleetsimError(f"--signals-from: expected auto, intervals or snapshots (got {signals_from!r})")
    weekends = _weekends(weekend_days)
    _check_targets(out, force, list(logs) + ([template] if template else []))
    raw = _read_template(template)
    telemetry = _read_logs(logs)
    frames, held, devices = _split(telemetry, held_out)
    if signals_from == "snapshots":
        frames["intervals"] = None
    elif signals_from == "intervals" and frames["intervals"] is None:
        raise FleetsimError("--signals-from intervals: no interval logs among the files")
    regions = set()
    for frame in (frames["intervals"], frames["snapshots"]):
        if frame is not None:
            regions |= set(frame["region"].astype(str))
    unknown = sorted(set(weekends) - regions)
    if unknown:
        raise FleetsimError(f"--weekend-days: region {unknown[0]!r} is not in the logs; they have "
                            f"{', '.join(sorted(regions))}")
    told = {r: frozenset(WEEKDAYS.index(d) + 1 for d in region.get("weekend_days", ["saturday", "sunday"]))
            for r, region in ((raw.get("fleet") or {}).get("regions") or {}).items() if r in regions}
    told.update(weekends)
    with progress_bar(1.0, "fitting") as tick:
        result = fit_fleet(frames["intervals"], frames["snapshots"], frames["traits"], raw, told, devices, tick)
    names = ", ".join(p.name for p in logs)
    header = [f"{len(logs)} log file(s): {names}; template {template or 'the bundled example'}",
              f"{devices - len(held)} devices fitted, {len(held)} held out (--held-out {held_out:g}); signals from "
              f"{result.source}; 95% intervals in the comments and in {out.name}{SIDE_SUFFIX}",
              f"caution: {CAUTION}"]
    text = render_yaml(result.fleet, result.comments, header)
    build_config(load_yaml_text(text), source=str(out))  # the text reads back as the fleet validated
    report, figures, report_data = _goodness(result.fleet, telemetry, held)
    side = {"written_by": WRITTEN_BY, "fleetsim": __version__, "fleet_file": out.name, "signals_from": result.source,
            "devices": {"fitted": devices - len(held), "held_out": len(held)}, "held_out_share": held_out,
            "warnings": result.warnings, "goodness": _clean(report_data), "caution": CAUTION,
            "estimates": _clean(result.rows)}
    _write_all(out, text, side, figures)
    lines = [f"fitted {devices - len(held)} devices ({len(held)} held out) from {result.source}: "
             f"{len(result.rows)} estimates, {len(result.warnings)} warnings"]
    lines += [f"warning: {w}" for w in result.warnings[:_SHOWN_WARNINGS]]
    if len(result.warnings) > _SHOWN_WARNINGS:
        lines.append(f"warning: ... and {len(result.warnings) - _SHOWN_WARNINGS} more in {out.name}{SIDE_SUFFIX}")
    return bool(figures), lines + report
