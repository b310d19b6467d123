"""Validated model of a fleet file: fleet, workload, rounds, selection, horizon, disruptions.

A fleet file is YAML read with ``yaml.safe_load`` and validated once, here, into typed
objects; nothing downstream patches dicts. :func:`load_config` and :func:`build_config`
raise :class:`~fleetsim.errors.ConfigError` whose lines each name the file, the key path,
the bad value and what was expected.

Modules, bottom up: ``fields`` (quantity types, traits, the strict base that refuses
renamed keys), ``yamltext`` (the YAML reader), ``devices`` (device types, signals, the
settled state, regional adjustments), ``fleetspec`` (regions, the fleet mix, merged
(type, region) specs), ``protocol`` (update encoding, secure aggregation, pacing),
``privacy`` (a workload's clipping and noise), ``impact`` (the model-impact replay's invented task and model),
``models`` (the other sections of a file),
``loading`` (overrides, validation, error lines, hash, schema), ``memory`` (the estimate
that refuses a run too large for the machine).
"""

from .devices import (
    BatteryLevel,
    BatteryLevels,
    DeviceAdjustment,
    DeviceType,
    SettledPattern,
    SignalPattern,
    WeekendPattern,
)
from .fields import (
    MIN_STEP_S,
    RENAMED_KEYS,
    SIGNALS,
    BitRateTrait,
    DurationTrait,
    EnergyTrait,
    PowerTrait,
    SizeTrait,
    Trait,
)
from .fleetspec import MAX_NAME_LENGTH, WEEKDAYS, FleetSpec, Region, name_problem
from .impact import GroupShift, ImpactSettings
from .jobs import MAIN, Job, merge_sections
from .loading import apply_overrides, build_config, config_hash, config_schema, example_path, load_config
from .memory import check_memory, estimate_memory, memory_limit
from .models import (
    MAX_TITLE_LENGTH,
    MIN_CHECKIN_S,
    MIN_CYCLE_S,
    Config,
    Disruption,
    Horizon,
    RoundSettings,
    Selection,
    Sharing,
    Workload,
    WorkloadEntry,
)
from .privacy import Privacy
from .protocol import WEIGHT_BYTES, Pacing, SecureAggregation, UpdateEncoding
from .yamltext import MAX_DEPTH, MAX_FILE_BYTES, MAX_NODES, load_yaml_text, read_yaml, structure_problem

__all__ = [
    "SIGNALS",
    "MIN_STEP_S",
    "MIN_CHECKIN_S",
    "MIN_CYCLE_S",
    "MAX_NAME_LENGTH",
    "MAX_TITLE_LENGTH",
    "MAX_FILE_BYTES",
    "MAX_DEPTH",
    "MAX_NODES",
    "RENAMED_KEYS",
    "Trait",
    "DurationTrait",
    "SizeTrait",
    "EnergyTrait",
    "PowerTrait",
    "BitRateTrait",
    "SignalPattern",
    "SettledPattern",
    "WeekendPattern",
    "DeviceAdjustment",
    "WEEKDAYS",
    "BatteryLevel",
    "BatteryLevels",
    "DeviceType",
    "Region",
    "FleetSpec",
    "Workload",
    "WorkloadEntry",
    "Privacy",
    "Sharing",
    "Job",
    "MAIN",
    "merge_sections",
    "UpdateEncoding",
    "WEIGHT_BYTES",
    "RoundSettings",
    "SecureAggregation",
    "Pacing",
    "Selection",
    "Horizon",
    "Disruption",
    "Config",
    "ImpactSettings",
    "GroupShift",
    "load_config",
    "build_config",
    "apply_overrides",
    "config_hash",
    "config_schema",
    "example_path",
    "read_yaml",
    "load_yaml_text",
    "structure_problem",
    "name_problem",
    "estimate_memory",
    "memory_limit",
    "check_memory",
]
