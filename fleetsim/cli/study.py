"""The ``sweep`` and ``compare`` commands: thin shells over :mod:`fleetsim.study`.

Expected failures are FleetsimError, printed as ``error: ...`` lines with exit status 2.
Ctrl-C stops a study with exit status 130; finished runs stay saved under ``--out``/cells
and the same command resumes from them. ``--out`` is claimed before any run starts: a new or
empty folder, or a study folder of the same kind (resumed); an earlier fleetsim output of
another kind only with ``--force``; never a folder fleetsim did not write.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import ExitStack, contextmanager
from pathlib import Path
from typing import TYPE_CHECKING

import typer

from ..errors import ConfigError, FleetsimError
from .console import FILE_HELP, fail, progress_bar, read_config, seed_option

if TYPE_CHECKING:
    from ..study.settings import FleetFile

__all__ = ["sweep", "compare"]


def _base(file: Path | None, overrides: list[str], devices: int | None, days: float | None,
          stress: Path | None) -> FleetFile:
    """Validate the fleet file as ``fleetsim run`` would, then keep its raw mapping for the cells."""
    from ..config import example_path
    from ..study.settings import FleetFile

    read_config(file, overrides, devices, days)
    extra = list(overrides)
    if devices is not None:
        extra.append(f"fleet.devices={devices}")
    if days is not None:
        extra.append(f"horizon.duration={days}d")
    base = FleetFile.read(file if file is not None else example_path(), extra)
    return base.with_stress(stress) if stress is not None else base


@contextmanager
def _progress() -> Iterator[Callable[[int, int], None]]:
    """A progress callback that opens the CLI's bar once the number of runs is known."""
    with ExitStack() as stack:
        tick: list[Callable[[float], None]] = []

        def update(done: int, total: int) -> None:
            if not tick:
                tick.append(stack.enter_context(progress_bar(total, "runs (cell x seed)")))
            tick[0](done)

        yield update


def _claim(out: Path, kind: str, force: bool, file: Path | None, stress: Path | None) -> None:
    """Claim ``out`` as a study folder of ``kind`` before any run starts (refusals name --out)."""
    from ..config import example_path
    from ..output import claim_study

    inputs = [file if file is not None else example_path(), *([stress] if stress is not None else [])]
    claim_study(out, kind, force=force, inputs=inputs, label=f"--out {out}",
                notice=lambda line: typer.echo(line, err=True))


_FORCE_HELP = "Replace an earlier fleetsim output of another kind at --out (never a folder fleetsim did not write)."


def _interrupted(out: Path | None) -> None:
    where = f"finished runs are saved in {out}/cells; run the same command again to resume" if out \
        else "nothing was saved (give --out to make a comparison resumable)"
    typer.echo(f"interrupted: {where}", err=True)
    raise typer.Exit(130)


def sweep(
    file: Path | None = typer.Argument(None, help=FILE_HELP, show_default=False),
    vary: list[str] = typer.Option(
        [], "--vary",
        help="A key and its values: key.path=v1,v2,... or key.path=start:stop:step (repeatable; "
             "the first two keys are the heat maps' axes).",
    ),
    seeds: int = typer.Option(5, "--seeds", help="Seeds per cell: first-seed .. first-seed+N-1."),
    first_seed: int = seed_option(0, "--first-seed", "The first seed."),
    out: Path = typer.Option(..., "--out", "-o", help="Study folder (finished runs are kept in it for resuming)."),
    overrides: list[str] = typer.Option(
        [], "--set", help="Override a key of the file for every cell (repeatable)."
    ),
    devices: int | None = typer.Option(None, "--devices", help="Fleet size (overrides the file)."),
    days: float | None = typer.Option(None, "--days", help="Horizon length in days (overrides the file)."),
    stress: Path | None = typer.Option(
        None, "--stress", help="YAML file with a 'disruptions:' list added to every cell."
    ),
    maximise: str | None = typer.Option(None, "--maximise", help="Metric (a study column) the recommendation "
                                        "maximises; default rounds_committed_per_hour, or with several "
                                        "workloads study_rounds_committed_per_hour (their sum); others such as "
                                        "study_used_reports_per_hour or study_used_examples_per_hour."),
    minimise: str | None = typer.Option(None, "--minimise", help="Metric the recommendation minimises instead."),
    limit: list[str] = typer.Option([], "--limit", help="A bound the recommended cell's mean must meet: "
                                    "METRIC<=VALUE or METRIC>=VALUE, e.g. waste_compute_fraction<=0.3 "
                                    "(repeatable; VALUE may be a percentage)."),
    workers: int = typer.Option(2, "--workers", help="Local worker processes (1 runs in this process)."),
    cluster: str | None = typer.Option(None, "--cluster", help="Run on the Dask scheduler at this address "
                                       "(e.g. tcp://127.0.0.1:8786) instead of local processes."),
    heatmap: list[str] = typer.Option([], "--heatmap", help="Also draw a heat map of this metric "
                                      "(repeatable; 'all' draws every metric)."),
    plot_format: str = typer.Option("png", "--plot-format", help="png, svg or both."),
    force: bool = typer.Option(False, "--force", help=_FORCE_HELP),
) -> None:
    """Run a grid of cells x seeds; write per-run and per-cell tables, the Pareto front,
    a recommendation and plots to --out."""
    from ..study.executors import make_executor
    from ..study.recommend import Objective, parse_limit
    from ..study.settings import parse_axis
    from ..study.sweep import run_sweep
    from ..study.sweep_output import default_heatmaps, render_sweep, write_sweep

    try:
        if maximise and minimise:
            raise ConfigError(["--maximise and --minimise: give one objective, not both"])
        if seeds < 1:
            raise ConfigError([f"--seeds {seeds}: expected at least 1"])
        if plot_format not in ("png", "svg", "both"):
            raise ConfigError([f"--plot-format {plot_format}: expected png, svg or both"])
        axes = [parse_axis(text) for text in vary]
        if not axes:
            raise ConfigError(
                ["--vary: give at least one key to vary, e.g. --vary rounds.over_selection=1.1,1.3,1.5"]
            )
        objective = (Objective(maximise, True) if maximise else Objective(minimise, False) if minimise
                     else None)  # None: the default for the file's workloads
        limits = [parse_limit(text) for text in limit]
        executor = make_executor(workers, cluster)
        base = _base(file, overrides, devices, days, stress)
        _claim(out, "sweep", force, file, stress)
        with _progress() as update:
            result = run_sweep(base, axes, range(first_seed, first_seed + seeds), objective, limits,
                               executor=executor, folder=out, progress=update)
        extra = list(heatmap) if heatmap else None
        if extra is not None and extra != ["all"]:
            extra = default_heatmaps(result) + extra
        written = write_sweep(result, out, heatmaps=extra, plot_format=plot_format)
    except FleetsimError as exc:
        fail(exc)
    except KeyboardInterrupt:
        _interrupted(out)
    typer.echo(render_sweep(result))
    kinds = "png and svg" if plot_format == "both" else plot_format
    typer.echo(f"wrote {out}/runs.parquet (.csv), cell_means, front.csv, study.json, study.md, the frontier "
               f"and {len(result.heatmap_metrics)} heat maps under {out}/heatmaps/ ({kinds}; "
               f"{len(written)} files)")


def compare(
    file: Path | None = typer.Argument(None, help=FILE_HELP, show_default=False),
    baseline: list[str] = typer.Option(
        [], "--baseline", help="A setting of the baseline: key.path=value (repeatable)."
    ),
    candidate: list[str] = typer.Option(
        [], "--candidate", help="A setting of the candidate: key.path=value (repeatable; e.g. "
                                "sharing.rule=shares with workloads.NAME.share=... for every workload)."
    ),
    seeds: int | None = typer.Option(None, "--seeds", help="Seeds: first-seed .. first-seed+N-1; each runs both "
                                     "arms (default 5).", show_default=False),
    first_seed: int = seed_option(0, "--first-seed", "The first seed."),
    out: Path | None = typer.Option(
        None, "--out", "-o", help="Folder for tables and saved runs (makes the comparison resumable)."
    ),
    overrides: list[str] = typer.Option([], "--set", help="Override a key of the file for both arms (repeatable)."),
    devices: int | None = typer.Option(None, "--devices", help="Fleet size (overrides the file)."),
    days: float | None = typer.Option(None, "--days", help="Horizon length in days (overrides the file)."),
    stress: Path | None = typer.Option(None, "--stress", help="YAML file with a 'disruptions:' list; both arms "
                                       "also run with it added, and each condition is compared."),
    primary: list[str] = typer.Option([], "--primary", help="A primary metric (repeatable): judged under Holm's "
                                      "method and deciding the overall line. Default: rounds_committed_per_hour, "
                                      "waste_compute_fraction, study_worst_representation (with several workloads "
                                      "the study_* totals)."),
    margin: list[str] = typer.Option([], "--margin", help="METRIC=2% (of the baseline mean) or METRIC=0.5: the "
                                     "largest change that does not matter; tested by TOST (repeatable)."),
    sequential: bool = typer.Option(False, "--sequential", help="Run --batch seeds at a time until every primary "
                                    "metric is decided or --seed-budget is spent (group-sequential design)."),
    seed_budget: int | None = typer.Option(None, "--seed-budget", help="With --sequential: the most seeds to run.",
                                           show_default=False),
    batch: int | None = typer.Option(None, "--batch", help="With --sequential: seeds per look (default 5).",
                                     show_default=False),
    detect: list[str] = typer.Option([], "--detect", help="METRIC=CHANGE: how many seeds would detect this change, "
                                     "e.g. rounds_committed_per_hour=5% (a number, or a percentage of the "
                                     "baseline mean; repeatable)."),
    power: float = typer.Option(0.8, "--power", help="Power for the seeds-needed figures."),
    workers: int = typer.Option(2, "--workers", help="Local worker processes (1 runs in this process)."),
    cluster: str | None = typer.Option(None, "--cluster", help="Run on the Dask scheduler at this address."),
    every: bool = typer.Option(False, "--all", help="Print every metric, not only the headline ones."),
    force: bool = typer.Option(False, "--force", help=_FORCE_HELP),
) -> None:
    """Run a baseline and a candidate under the same seeds; paired differences, intervals, adjusted
    p-values and a verdict per metric, and one overall line decided by the primary metrics."""
    from ..study.compare import Arm, parse_detect, run_compare
    from ..study.compare_output import render_compare, write_compare
    from ..study.compare_rules import parse_design, parse_margin
    from ..study.executors import make_executor

    try:
        chosen, plan = parse_design(seeds, sequential, seed_budget, batch, first_seed)
        wanted = [parse_detect(text) for text in detect]
        margins = [parse_margin(text) for text in margin]
        executor = make_executor(workers, cluster)
        base = _base(file, overrides, devices, days, None)
        if out is not None:
            _claim(out, "compare", force, file, stress)
        with _progress() as update:
            result = run_compare(
                base, Arm("baseline", tuple(baseline)), Arm("candidate", tuple(candidate)),
                chosen, stress=stress, detect=wanted, power=power,
                executor=executor, folder=out, progress=update, primary=list(primary) or None,
                margins=margins, sequential=plan,
            )
        if out is not None:
            write_compare(result, out)
    except FleetsimError as exc:
        fail(exc)
    except KeyboardInterrupt:
        _interrupted(out)
    typer.echo(render_compare(result, every_metric=every))
    if out is not None:
        typer.echo(f"wrote {out}/runs.parquet (.csv), differences.parquet (.csv), comparison.json, comparison.md")
