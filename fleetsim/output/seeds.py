"""A multi-seed run folder: one set of settings run under several seeds, and their combined summary.

Layout of a multi-seed run folder (``fleetsim run --seeds N``)::

    summary.json        the combined summary (docs/metrics.md, "Several seeds")
    seeds/SEED/         a complete run folder of each seed (docs: fleetsim/output/run.py), with
                        its own marker of kind ``run``, so every tool reads it as any run folder
    report.html, .md    the multi-seed report, once written
    .fleetsim-output    the marker: kind ``seeds``

The combined summary holds, for every numeric figure of the seeds' summaries, the mean over
the seeds where it is finite, the Student t interval of that mean (95%, between seeds) and
the number of seeds it rests on. :func:`combine_runs` computes it from run folders, so the
folder ``fleetsim run --seeds`` writes and a report over several ordinary run folders of the
same settings rest on one computation. The t interval lives here, below both the command
line and the report, which share it.
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Iterable, Sequence
from pathlib import Path
from typing import Any

from ..errors import FleetsimError
from .files import unescape_frame
from .folders import MARKER, atomic_folder, marker_text

__all__ = ["SEEDS", "LEVEL", "METHOD", "GROUPINGS", "seed_interval", "numeric_figures", "combine_runs",
           "combine", "read_seed_run", "same_settings", "write_seeds"]

SEEDS = "seeds"
"""Subfolder of a multi-seed run folder: one run folder per seed (``seeds/SEED/``)."""

LEVEL = 0.95
"""Confidence level of the between-seed intervals."""

METHOD = "student-t"
"""The between-seed interval: mean +- t(1 - (1 - LEVEL) / 2, n - 1) x sd / sqrt(n) over n seeds."""

GROUPINGS = {"device_type": "bias_by_device_type", "region": "bias_by_region",
             "data_quartile": "bias_by_data_quartile"}
"""Grouping column -> the per-seed bias table whose counts the pooled representation ratio sums."""

_HEADER = ("scenario", "fleet_file", "config_hash", "policy", "devices", "horizon_start", "simulated_hours", "replay")
"""Keys of the first seed's summary copied to the combined summary (the same settings in every seed)."""


def seed_interval(values: Iterable[Any], level: float = LEVEL) -> dict[str, Any]:
    """The between-seed figure of one summary key: ``{"seeds", "mean", "sd", "low", "high"}``.

    Only finite numbers count (None, NaN and infinities are a figure a seed could not
    measure); ``seeds`` says how many did. Student t interval of the mean (Student,
    Biometrika 6, 1908): mean +- t_{(1+level)/2, n-1} sd / sqrt(n), sd with n - 1 in the
    denominator. Mean null with no seed; sd and bounds null with fewer than two.
    """
    from scipy import stats  # here: reading a folder's layout needs no statistics library

    kept = [float(v) for v in values if _finite(v)]
    n = len(kept)
    out: dict[str, Any] = {"seeds": n, "mean": None, "sd": None, "low": None, "high": None}
    if n == 0:
        return out
    mean = math.fsum(kept) / n
    out["mean"] = mean
    if n < 2:
        return out
    sd = math.sqrt(math.fsum((v - mean) ** 2 for v in kept) / (n - 1))
    half = float(stats.t.ppf(0.5 + level / 2.0, n - 1)) * sd / math.sqrt(n)
    out.update(sd=sd, low=mean - half, high=mean + half)
    return out


def _finite(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def numeric_figures(summaries: Sequence[dict[str, Any]]) -> list[tuple[tuple[str, ...], list[Any]]]:
    """Every key path holding a number (or null) in some summary, with each summary's value there.

    Paths are listed in the order they first appear; a path missing from a summary gives
    None for it. The top-level ``seed`` is an identity, not a figure, and is left out; so are
    text and true/false values.
    """
    order: dict[tuple[str, ...], None] = {}
    flat: list[dict[tuple[str, ...], Any]] = []
    for summary in summaries:
        leaves: dict[tuple[str, ...], Any] = {}
        _leaves(summary, (), leaves)
        leaves.pop(("seed",), None)
        flat.append(leaves)
        order.update(dict.fromkeys(leaves))
    numeric = [p for p in order if any(_finite(f.get(p)) for f in flat)]
    return [(p, [f.get(p) if _finite(f.get(p)) or f.get(p) is None else None for f in flat]) for p in numeric]


def _leaves(value: Any, path: tuple[str, ...], out: dict[tuple[str, ...], Any]) -> None:
    if isinstance(value, dict):
        for key, inner in value.items():
            _leaves(inner, (*path, str(key)), out)
    elif value is None or _finite(value) or isinstance(value, float):
        out[path] = value


def _pooled(grouping: str, tables: Sequence[Any]) -> list[dict[str, Any]]:
    """Per group: the representation ratio of the seeds' pooled counts, with its Wilson interval.

    Pooled report share = sum of the group's used reports / sum of all used reports; pooled
    fleet share = sum of the group's devices / sum of all devices (both over the seeds); the
    ratio and the Wilson score interval of the pooled report share (Wilson, JASA 22, 1927,
    :func:`fleetsim.analysis.wilson_interval`) are divided by the pooled fleet share.
    """
    import numpy as np

    from ..analysis import wilson_interval

    names: dict[str, None] = {}
    for table in tables:
        names.update(dict.fromkeys(str(g) for g in table[grouping]))
    devices = {g: 0.0 for g in names}
    reports = {g: 0.0 for g in names}
    for table in tables:
        for g, d, r in zip(table[grouping], table["devices"], table["reports"], strict=True):
            devices[str(g)] += float(d)
            reports[str(g)] += float(r)
    all_devices, all_reports = sum(devices.values()), sum(reports.values())
    counts = np.array([reports[g] for g in names])
    low, high = wilson_interval(counts, all_reports)
    rows = []
    for i, g in enumerate(names):
        fleet = devices[g] / all_devices if all_devices else math.nan
        share = reports[g] / all_reports if all_reports else math.nan
        ratio = share / fleet if fleet else math.nan
        rows.append({"grouping": grouping, "group": g, "devices": int(devices[g]), "reports": int(reports[g]),
                     "pooled": _number(ratio), "wilson_low": _number(low[i] / fleet if fleet else math.nan),
                     "wilson_high": _number(high[i] / fleet if fleet else math.nan)})
    return rows


def _number(value: float) -> float | None:
    return float(value) if math.isfinite(value) else None


def combine(summaries: Sequence[dict[str, Any]], bias: Sequence[dict[str, Any]] | None = None,
            folders: Sequence[str] = ()) -> dict[str, Any]:
    """The combined summary of one set of settings run under several seeds.

    ``summaries``: each seed's summary.json, in seed order; ``bias``: each seed's bias
    tables by name (:data:`GROUPINGS`), for the pooled representation ratios (left out when
    None); ``folders``: where each seed's run folder is, as recorded in the summary.
    """
    first = summaries[0]
    figures = []
    index = {}
    for path, values in numeric_figures(summaries):
        record = {"path": list(path), "values": values, **seed_interval(values)}
        index[path] = record
        figures.append(record)
    representation = []
    for grouping, table in GROUPINGS.items():
        if bias is None:
            break
        for row in _pooled(grouping, [b[table] for b in bias]):
            key = ("bias", f"by_{grouping}", row["group"], "representation_ratio")
            between = index.get(key, seed_interval([]))
            representation.append({**row, **{k: between[k] for k in ("seeds", "mean", "low", "high")}})
    return {
        **{k: first.get(k) for k in _HEADER},
        "seeds": [s.get("seed") for s in summaries],
        "folders": list(folders),
        "between_seeds": {"method": METHOD, "level": LEVEL},
        "figures": figures,
        "representation": representation,
        "caution": first.get("caution"),
    }


def _read_json(path: Path) -> dict[str, Any]:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise FleetsimError(f"{path}: cannot read ({exc.strerror or exc}); is {path.parent} a run folder?") from None
    except json.JSONDecodeError as exc:
        raise FleetsimError(f"{path}: not valid JSON ({exc.msg} at line {exc.lineno})") from None
    if not isinstance(data, dict):
        raise FleetsimError(f"{path}: expected a JSON object; is {path.parent} a run folder?")
    return data


def read_seed_run(folder: str | Path) -> tuple[dict[str, Any], dict[str, Any], dict[str, Any]]:
    """A run folder's summary.json, config.json and bias tables (the columns :func:`combine` sums).

    Raises FleetsimError naming the file that is missing or broken.
    """
    import pandas as pd

    path = Path(folder)
    summary, config = _read_json(path / "summary.json"), _read_json(path / "config.json")
    tables = {}
    for key, name in GROUPINGS.items():
        file = path / "tables" / f"{name}.csv"
        try:
            table = unescape_frame(pd.read_csv(file, dtype={key: str}, keep_default_na=False,
                                               na_values={"devices": [""], "reports": [""]}))
        except FileNotFoundError:
            raise FleetsimError(f"{file}: missing; is {path} a run folder?") from None
        except (OSError, ValueError, pd.errors.ParserError) as exc:
            raise FleetsimError(f"{file}: cannot read the table ({' '.join(str(exc).split())})") from None
        lacking = [c for c in (key, "devices", "reports") if c not in table.columns]
        if lacking:
            raise FleetsimError(f"{file}: lacks column(s) {', '.join(lacking)}")
        tables[name] = table
    return summary, config, tables


def _difference(a: Any, b: Any, path: str = "") -> tuple[str, Any, Any] | None:
    """The first key path where two settings differ, with both values (``missing`` where absent)."""
    if isinstance(a, dict) and isinstance(b, dict):
        for key in [*a, *(k for k in b if k not in a)]:
            inner = f"{path}.{key}" if path else str(key)
            if key not in a or key not in b:
                return inner, a[key] if key in a else "missing", b[key] if key in b else "missing"
            found = _difference(a[key], b[key], inner)
            if found:
                return found
        return None
    return None if a == b else (path or "(the whole file)", a, b)


def _short(value: Any) -> str:
    text = value if isinstance(value, str) and value == "missing" else json.dumps(value, sort_keys=True)
    return text if len(text) <= 60 else text[:57] + "..."


def same_settings(runs: Sequence[tuple[Path, dict[str, Any], dict[str, Any]]]) -> None:
    """Check that run folders (path, summary, config) hold one set of settings under distinct seeds.

    Raises FleetsimError, one line naming both folders and what differs: a key of
    config.json (or the configuration hash), or a seed two folders share.
    """
    a, first, first_config = runs[0]
    seen: dict[Any, Path] = {}
    for b, summary, config in runs:
        if summary.get("config_hash") != first.get("config_hash") or config != first_config:
            found = _difference(first_config, config)
            what = (f"{found[0]}: {_short(found[1])} in {a}, {_short(found[2])} in {b}" if found else
                    f"configuration hash {first.get('config_hash')} in {a}, {summary.get('config_hash')} in {b}")
            raise FleetsimError(f"{b}: not the same settings as {a} ({what}); a report over several runs needs "
                                "one set of settings under different seeds")
        seed = summary.get("seed")
        if seed in seen:
            raise FleetsimError(f"{b}: holds seed {seed}, as {seen[seed]} does; a report over several runs needs "
                                "each seed once")
        seen[seed] = b


def combine_runs(folders: Sequence[str | Path], names: Sequence[str] | None = None) -> dict[str, Any]:
    """The combined summary of run folders of the same settings (sorted by seed).

    ``names``: how the summary records each folder (default: the path as given). Raises
    FleetsimError for a folder that is not readable, different settings or a repeated seed.
    """
    runs = [(Path(f), *read_seed_run(f)) for f in folders]
    same_settings([(p, s, c) for p, s, c, _ in runs])
    labels = list(names) if names is not None else [str(f) for f in folders]
    order = sorted(range(len(runs)), key=lambda i: runs[i][1].get("seed", 0))
    return combine([runs[i][1] for i in order], [runs[i][3] for i in order], [labels[i] for i in order])


def write_seeds(
    out: str | Path, seeds: Sequence[int], fill_seed: Callable[[int, Path], None], *, force: bool = False,
    inputs: Iterable[str | Path] = (), label: str | None = None, notice: Callable[[str], None] | None = None,
) -> Path:
    """Write a multi-seed run folder at ``out``, all or nothing.

    ``fill_seed(seed, folder)`` writes one seed's complete run folder into the new folder
    ``folder`` (``seeds/SEED/``, which gets the marker of a run); the combined summary is then
    computed from what was written (:func:`combine_runs`). ``force``, ``inputs``, ``label``
    and ``notice`` as for :func:`fleetsim.output.atomic_folder`. Raises FleetsimError.
    """

    def fill(folder: Path) -> None:
        subs = []
        for seed in seeds:
            sub = folder / SEEDS / str(seed)
            sub.mkdir(parents=True)
            fill_seed(seed, sub)
            (sub / MARKER).write_text(marker_text("run"), encoding="utf-8")
            subs.append(sub)
        combined = combine_runs(subs, [f"{SEEDS}/{seed}" for seed in seeds])
        (folder / "summary.json").write_text(json.dumps(combined, indent=2) + "\n", encoding="utf-8")

    return atomic_folder(Path(out), fill, kind=SEEDS, force=force, inputs=inputs, label=label, notice=notice)
