"""Reading a run folder for the report: summary, settings and tables.

The report reads only what :func:`fleetsim.output.write_run` wrote: summary.json, the
run's settings (config.json, validated into a :class:`fleetsim.config.Config`) and the
tables under tables/, which hold every figure the report shows (with ``privacy`` in the
summary, the privacy tables too; with impact.json, written by ``fleetsim impact``, it and its
tables). The event log is not read, but a run folder must hold a readable one. Every problem is a
:class:`~fleetsim.errors.FleetsimError` whose one-line message names the file and what is
wrong with it.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd

from ..config import Config, build_config
from ..errors import ConfigError, FleetsimError
from ..output import read_summary, unescape_frame
from ..survival import SURVIVAL_COLUMNS

__all__ = ["RunFolder", "read_run_folder", "PRIVACY_TABLES", "IMPACT_FILE"]

# Columns holding names (from the fleet file or the metrics): read as text, never as numbers
# or missing values, so a region called "NA" or "1" stays exactly what the fleet file says.
_TEXT_COLUMNS = {"device_type", "region", "data_quartile", "cause", "dropout_cause", "dropout_phase", "status",
                 "hour_utc", "opened_utc",
                 "day_utc", "grouping", "group", "scope", "workload", "clock"}

# Every table the report reads, with the columns it needs.
_TABLE_COLUMNS: dict[str, tuple[str, ...]] = {
    "hourly": ("hour", "hour_utc", "committed", "selection_timeout", "report_deadline", "eligible",
               "checkins_per_s", "turned_away_share", "accepted", "peak_working", "held_s", "rounds_open"),
    "hourly_eligible_by_region": ("hour", "hour_utc", "region", "eligible"),
    "rounds": ("round", "status", "selection_s", "report_s", "duration_s"),
    "waste_by_cause": ("cause", "compute_s", "bytes", "energy_wh", "examples", "participations", "compute_share"),
    "waste_by_device_type": ("device_type", "compute_s", "wasted_compute_s", "bytes", "wasted_bytes",
                             "energy_wh", "wasted_energy_wh", "examples", "wasted_examples", "compute_fraction",
                             "bytes_fraction", "energy_fraction", "examples_fraction"),
    "unmasking_by_accepted": ("accepted", "needed", "rounds", "failed", "failed_share", "reports_mean",
                              "responses_mean", "responses_p10", "margin_mean", "margin_min"),
    "participation_counts": ("reports", "devices"),
    "dropouts": ("dropout_cause", "dropout_phase", "dropouts"),
    "device_cost": ("device_type", "participations", "battery_pct_p50", "battery_pct_p90",
                    "bytes_p50", "bytes_p90", "energy_wh_mean"),
    "daily": ("day", "day_utc", "committed", "selection_timeout", "report_deadline", "eligible_min",
              "eligible_mean", "eligible_max"),
    "chi_square": ("grouping", "groups", "reports", "statistic", "dof", "p"),
    "lorenz": ("device_share", "report_share"),
    "task_survival": SURVIVAL_COLUMNS,
    "task_survival_by_minute": SURVIVAL_COLUMNS,
}
_BIAS_COLUMNS = ("devices", "fleet_share", "eligible_share", "accepted_share", "report_share", "weight_share",
                 "representation_ratio", "ratio_low", "ratio_high", "example_share", "weight_ratio",
                 "weight_ratio_low", "weight_ratio_high", "accepted", "reports", "never_share")
BIAS_GROUPINGS = {"device_type": "bias_by_device_type", "region": "bias_by_region",
                  "data_quartile": "bias_by_data_quartile"}
"""Grouping column -> table name of the participation-bias tables."""
PAIR_TABLE = "bias_by_device_type_region"
"""The bias table of (device type, region) pairs."""

for _key, _name in BIAS_GROUPINGS.items():
    _TABLE_COLUMNS[_name] = (_key, *_BIAS_COLUMNS)
_TABLE_COLUMNS[PAIR_TABLE] = ("device_type", "region", *_BIAS_COLUMNS)
_OUTCOME_COLUMNS = ("accepted", "abandoned_share", "failed_share", "compute_fraction", "bytes_fraction",
                    "energy_fraction", "examples_fraction")
_TABLE_COLUMNS["outcomes_by_region"] = ("region", *_OUTCOME_COLUMNS)
_TABLE_COLUMNS["outcomes_by_hour"] = ("clock", "hour_of_day", "rounds", "rounds_committed", "rounds_abandoned",
                                      "rounds_failed", *_OUTCOME_COLUMNS)

_EVENT_COLUMNS = ("device_type", "outcome", "accepted_s", "ended_s")
"""Columns a run folder's event log must have (the report checks them; its figures come from tables)."""

_SUMMARY_KEYS = (
    "scenario", "seed", "config_hash", "policy", "devices", "horizon_start", "simulated_hours", "caution",
    "rounds.attempted", "rounds.committed", "rounds.ended_by.selection_timeout",
    "rounds.ended_by.report_deadline", "rounds.ended_by.server_outage", "rounds.ended_by.unmasking_failed",
    "rounds.committed_per_hour", "rounds.selection_s", "rounds.report_s", "rounds.duration_s",
    "rounds.selection_at_timeout", "rounds.eligible_correlation", "rounds.configure", "rounds.secure_aggregation",
    "rounds.pacing", "rounds.in_flight", "rounds.open_peak", "rounds.open_mean",
    "participations.accepted", "participations.used_reports", "participations.task_s",
    "participations.round_dropout_share",
    "waste.compute_fraction", "waste.bytes_fraction", "waste.energy_fraction", "waste.examples_fraction",
    "waste.examples", "waste.examples_processed",
    "outcomes.by_region", "outcomes.by_hour_utc", "outcomes.by_hour_local",
    "bias.coverage", "bias.gini", "bias.chi_square_device_type", "bias.chi_square_device_type_p",
    "bias.top_tenth_share",
    "load.peak_working", "load.mean_working", "load.checkins_per_s_peak_hour", "secure_aggregation",
    "server_load.basis", "server_load.checkins_per_s_mean", "server_load.checkins_per_s_peak",
    "server_load.peak_hour_utc", "server_load.checkins", "server_load.accepted", "server_load.turned_away_share",
    "server_load.rounds_held", "server_load.held_s", "server_load.held_share",
)

_SECURE_KEYS = ("threshold", "needed", "masked_upload_bytes", "reached_unmasking", "failed", "failed_share",
                "responses_mean", "responses_p10", "margin_mean", "margin_p10", "reporters_lost_mean", "unmasking_s")
"""Keys of summary.json's ``secure_aggregation`` block when it is not null (secure aggregation on)."""


@dataclass(frozen=True)
class RunFolder:
    """The parts of a run folder the report uses.

    ``config``: the run's validated settings; ``tables`` maps a table name (``hourly``,
    ``bias_by_region``, ...) to its DataFrame as written under ``tables/``.
    """

    path: Path
    summary: dict[str, Any]
    config: Config
    tables: dict[str, pd.DataFrame]
    impact: dict[str, Any] | None = None
    """impact.json as ``fleetsim impact`` wrote it (None when the folder has none); its tables
    ``impact_curves`` (and ``impact_final`` when present) are in ``tables``."""

    @property
    def type_names(self) -> list[str]:
        return list(self.tables["bias_by_device_type"]["device_type"])

    @property
    def region_names(self) -> list[str]:
        return list(self.tables["bias_by_region"]["region"])


def _lookup(mapping: dict[str, Any], dotted: str) -> Any:
    value: Any = mapping
    for part in dotted.split("."):
        if not isinstance(value, dict) or part not in value:
            raise KeyError(dotted)
        value = value[part]
    return value


def _read_json(path: Path, keys: tuple[str, ...], folder: Path) -> dict[str, Any]:
    if path.name == "summary.json":
        data = read_summary(folder)
    else:
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except OSError as exc:
            raise FleetsimError(f"{path}: cannot read ({exc.strerror or exc}); is {folder} a run folder?") from None
        except json.JSONDecodeError as exc:
            raise FleetsimError(f"{path}: not valid JSON ({exc.msg} at line {exc.lineno})") from None
    if not isinstance(data, dict):
        raise FleetsimError(f"{path}: expected a JSON object; is {folder} a run folder?")
    for key in keys:
        try:
            _lookup(data, key)
        except KeyError:
            raise FleetsimError(f"{path}: lacks '{key}'; was it written by this version of fleetsim?") from None
    return data


PRIVACY_TABLES = {"device_type": "privacy_by_device_type", "region": "privacy_by_region"}
"""Grouping column -> table name of the per-device privacy figures by group (with ``privacy``)."""
_PRIVACY_COLUMNS = ("devices", "reporting_devices", "participations_max", "epsilon_median", "epsilon_p90",
                    "epsilon_p99", "epsilon_worst", "epsilon_uniform_sampling", "devices_over_uniform_claim")
_PRIVACY_KEYS = ("clipping_norm", "noise_multiplier", "delta", "committed_rounds", "sampling_rate", "devices",
                 "reporting_devices", "never_reported", "participations_max", "epsilon.median", "epsilon.p90",
                 "epsilon.p99", "epsilon.worst", "epsilon_uniform_sampling", "devices_over_uniform_claim",
                 "worst_device")
"""Keys of summary.json's ``privacy`` block the report reads (when the workload had ``privacy``)."""

IMPACT_FILE = "impact.json"
_IMPACT_NUMBERS = ("impact.overall.accuracy", "impact.worst_group.accuracy", "impact.best_group.accuracy",
                   "impact.gap", "impact.rounds_trained")
_IMPACT_TEXT = ("impact.worst_group.grouping", "impact.worst_group.group", "impact.best_group.grouping",
                "impact.best_group.group", "caution")
_IMPACT_GROUPS = ("impact.by_device_type", "impact.by_region", "impact.by_data_quartile")
_IMPACT_TABLES = {"impact_curves": ("round", "time_s", "grouping", "group", "accuracy", "loss"),
                  "impact_final": ("grouping", "group", "accuracy", "loss", "devices", "reports")}
"""impact.json's tables: the curves (required beside it) and the final figures (read when present)."""


def _is_number(value: Any, missing: bool = False) -> bool:
    """A JSON number (not true/false); None too when ``missing`` is allowed."""
    if value is None:
        return missing
    return isinstance(value, int | float) and not isinstance(value, bool)


def _read_privacy(path: Path, summary: dict[str, Any]) -> dict[str, pd.DataFrame]:
    """The privacy tables of a run whose summary has ``privacy`` (none otherwise), its keys checked."""
    privacy = summary.get("privacy")
    if privacy is None:
        return {}
    for key in _PRIVACY_KEYS:
        try:
            _lookup(privacy, key)
        except KeyError:
            raise FleetsimError(f"{path / 'summary.json'}: lacks 'privacy.{key}'; was it written by this version "
                                "of fleetsim?") from None
    worst = privacy["worst_device"]
    if worst is not None and not (isinstance(worst, dict) and all(
            k in worst for k in ("device", "device_type", "region", "participations", "epsilon"))):
        raise FleetsimError(f"{path / 'summary.json'}: 'privacy.worst_device' is not a device's record; was it "
                            "written by this version of fleetsim?")
    return {name: _read_table(path / "tables" / f"{name}.csv", (key, *_PRIVACY_COLUMNS))
            for key, name in PRIVACY_TABLES.items()}


def _check_impact(where: Path, data: dict[str, Any]) -> None:
    """Check that impact.json holds the figures the report shows, each of its kind (one-line errors)."""
    def bad(key: str, value: Any, expected: str) -> FleetsimError:
        return FleetsimError(f"{where}: '{key}' is {json.dumps(value)[:60]}, expected {expected}; was it written "
                             "by 'fleetsim impact'?")

    for keys, check, expected in ((_IMPACT_NUMBERS, _is_number, "a number"),
                                  (_IMPACT_TEXT, lambda v: isinstance(v, str), "text"),
                                  (_IMPACT_GROUPS, lambda v: isinstance(v, dict), "an object of accuracies")):
        for key in keys:
            value = _lookup(data, key)
            if not check(value):
                raise bad(key, value, expected)
    for key in _IMPACT_GROUPS:
        for name, value in _lookup(data, key).items():
            if not _is_number(value, missing=True):
                raise bad(f"{key}.{name}", value, "a number")


def _read_impact(path: Path) -> tuple[dict[str, Any] | None, dict[str, pd.DataFrame]]:
    """impact.json and its tables when the folder has one (``fleetsim impact``), else (None, {})."""
    where = path / IMPACT_FILE
    if not where.exists():
        return None, {}
    data = _read_json(where, (*_IMPACT_NUMBERS, *_IMPACT_TEXT, *_IMPACT_GROUPS), path)
    _check_impact(where, data)
    tables = {}
    for name, columns in _IMPACT_TABLES.items():
        target = path / "tables" / f"{name}.csv"
        if not target.exists():
            if name == "impact_final":
                continue
            raise FleetsimError(f"{target}: missing although {where} is there; run 'fleetsim impact' again")
        table = _read_table(target, columns)
        text = [c for c in columns if c not in _TEXT_COLUMNS and not pd.api.types.is_numeric_dtype(table[c])]
        if text:
            raise FleetsimError(f"{target}: column {text[0]} holds text where numbers belong")
        tables[name] = table
    return data, tables


def _read_table(path: Path, columns: tuple[str, ...]) -> pd.DataFrame:
    try:
        header = pd.read_csv(path, nrows=0).columns
        text = {c: str for c in header if c in _TEXT_COLUMNS}
        # Only empty fields are missing values: pandas would otherwise read a name such as
        # "NA" or "null" as NaN.
        missing = {c: [""] for c in header if c not in _TEXT_COLUMNS}
        # round_trip: every float exactly as written (the default parser may be off by one unit
        # in the last place).
        table = unescape_frame(pd.read_csv(path, dtype=text, keep_default_na=False, na_values=missing,
                                           float_precision="round_trip"))
    except FileNotFoundError:
        raise FleetsimError(f"{path}: missing; is {path.parent.parent} a run folder?") from None
    except (OSError, ValueError, pd.errors.ParserError) as exc:
        raise FleetsimError(f"{path}: cannot read the table ({' '.join(str(exc).split())})") from None
    lacking = [c for c in columns if c not in table.columns]
    if lacking:
        raise FleetsimError(f"{path}: lacks column(s) {', '.join(lacking)}")
    return table


def _check_events(path: Path) -> None:
    """Check that the event log is a readable Parquet file with the participation columns.

    Only its schema is read (cheap): the report's figures come from the tables.
    """
    import pyarrow.parquet as pq

    try:
        names = set(pq.read_schema(path).names)
    except FileNotFoundError:
        raise FleetsimError(f"{path}: missing; is {path.parent} a run folder?") from None
    except Exception as exc:  # pyarrow raises several kinds (ArrowInvalid, OSError, ...)
        raise FleetsimError(f"{path}: cannot read the event log ({' '.join(str(exc).split())})") from None
    lacking = [c for c in _EVENT_COLUMNS if c not in names]
    if lacking:
        raise FleetsimError(f"{path}: lacks column(s) {', '.join(lacking)}")


def _read_config(path: Path, folder: Path) -> Config:
    """The run's settings from config.json, validated as a fleet file is."""
    raw = _read_json(path, (), folder)
    try:
        return build_config(raw, source=str(path))
    except ConfigError as exc:
        first = exc.problems[0] if exc.problems else f"{path}: not valid settings"
        raise FleetsimError(f"{first}; was it written by this version of fleetsim?") from None


def read_run_folder(folder: str | Path) -> RunFolder:
    """Read and check a run folder; raises FleetsimError naming the first problem found."""
    path = Path(folder)
    if not path.exists():
        raise FleetsimError(f"{path}: no such folder")
    if not path.is_dir():
        raise FleetsimError(f"{path}: not a folder (expected a run folder written by 'fleetsim run')")
    summary = _read_json(path / "summary.json", _SUMMARY_KEYS, path)
    secure = summary["secure_aggregation"]
    lacking_keys = [k for k in _SECURE_KEYS if not isinstance(secure, dict) or k not in secure]
    if secure is not None and lacking_keys:
        raise FleetsimError(f"{path / 'summary.json'}: lacks 'secure_aggregation.{lacking_keys[0]}'; was it written "
                            "by this version of fleetsim?")
    config = _read_config(path / "config.json", path)
    tables = {name: _read_table(path / "tables" / f"{name}.csv", cols) for name, cols in _TABLE_COLUMNS.items()}
    tables.update(_read_privacy(path, summary))
    impact, impact_tables = _read_impact(path)
    tables.update(impact_tables)
    _check_events(path / "events.parquet")
    regions = list(tables["bias_by_region"]["region"])
    lacking = sorted(set(regions) - set(tables["hourly_eligible_by_region"]["region"]))
    if lacking:
        raise FleetsimError(f"{path / 'tables' / 'hourly_eligible_by_region.csv'}: lacks region(s) "
                            f"{', '.join(lacking)}")
    return RunFolder(path=path, summary=summary, config=config, tables=tables, impact=impact)
