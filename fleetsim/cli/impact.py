"""The ``fleetsim impact`` command: train the run's model on its committed rounds (docs/impact.md).

Reads a run folder, rebuilds the run's fleet from its settings and seed, replays every
committed round with Federated Averaging over exactly the devices whose reports it used
(:mod:`fleetsim.impact`), and writes ``impact.json`` and two tables into the run folder.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import typer

from ..errors import FleetsimError
from .console import SetOpt, fail, one_line, progress_bar

__all__ = ["impact"]


def _check_fleet(fleet: Any, participations: Any, where: Path) -> None:
    """Refuse when the rebuilt fleet is not the run's (its devices' sample counts differ)."""
    import numpy as np

    devices = participations["device"].to_numpy(dtype=np.int64)
    if devices.size == 0:
        return
    if devices.max() >= fleet.size or np.any(fleet.samples[devices] != participations["samples"].to_numpy()):
        raise FleetsimError(f"{where / 'events.parquet'}: its devices are not those of the run's settings and "
                            "seed; was it written by this version of fleetsim?")


def _brief(summary: dict[str, Any]) -> list[str]:
    """The terminal lines: overall, worst and best served groups, the gap, by device type."""
    lines = [f"trained on {summary['rounds_trained']} committed rounds"]
    overall = summary["overall"]
    lines.append(f"held-out accuracy {overall['accuracy']:.3f} (loss {overall['loss']:.3f})")
    worst, best = summary["worst_group"], summary["best_group"]
    lines.append(f"worst served: {worst['grouping']} {worst['group']} {worst['accuracy']:.3f}; best: "
                 f"{best['grouping']} {best['group']} {best['accuracy']:.3f}; gap {summary['gap']:.3f}")
    by_type = ", ".join(f"{name} {value:.3f}" for name, value in summary["by_device_type"].items())
    lines.append(f"by device type: {by_type}")
    return lines


def impact(
    run_dir: Path = typer.Argument(..., help="A run folder written by 'fleetsim run --out'.", show_default=False),
    overrides: list[str] = SetOpt,
    workload: str | None = typer.Option(None, "--workload", help="With several workloads: the one to train."),
) -> None:
    """Train the run's model on its committed rounds; write impact.json and tables into RUN_DIR.

    Each committed round averages, weighted by the examples each trained on, the updates of
    exactly the devices whose reports it used. --set changes the invented task and model
    (keys under impact.), never the run.
    """
    from ..fleet import sample_fleet
    from ..impact import model_impact
    from ..output.impact import read_run_rounds, write_impact

    bad = [item for item in overrides if not item.strip().startswith("impact.")]
    try:
        if bad:
            raise FleetsimError(f"--set: {bad[0]!r}: only keys under impact. change a replay of the rounds; "
                                "to change the run, run it again")
        run = read_run_rounds(run_dir, overrides, workload)
        if run.replay:
            raise FleetsimError(f"{run_dir}: a run driven by logged devices (--replay); their sample counts are "
                                "not in the run folder, so their data cannot be rebuilt")
        fleet = sample_fleet(run.config, run.seed)
        _check_fleet(fleet, run.participations, run.folder)
        committed = int((run.rounds["status"] == "committed").sum())
        with progress_bar(max(committed, 1), "training") as tick:
            result = model_impact(run.config, run.participations, run.rounds, fleet, run.seed,
                                  on_progress=lambda done, total: tick(done))
        settings = run.config.impact.model_dump(mode="json") if run.config.impact is not None else None
        figures = {key: value for key, value in result.summary.items() if key != "caution"}
        caution = result.summary["caution"]
        record = {"impact": figures, "seed": run.seed, "settings": settings, "caution": caution}
        paths = write_impact(run.folder, record, {"impact_curves": result.curves, "impact_final": result.final})
    except FleetsimError as exc:
        fail(exc)
    for line in _brief(result.summary):
        typer.echo(one_line(line))
    typer.echo(f"caution: {caution}")
    typer.echo(f"wrote {', '.join(str(p) for p in paths)}")
