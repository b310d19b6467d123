"""Telemetry: the interval-log, snapshot, trait and task formats, reading and validating
them, synthetic telemetry from a fleet file, and writing it (docs/telemetry.md).

An I/O layer beside :mod:`fleetsim.output`: :func:`read_telemetry` reads CSV or Parquet
files into a :class:`Telemetry` of pandas frames, validated against the Table Schema
descriptors shipped in ``fleetsim/data/telemetry/`` and the formats' own rules;
:func:`generate_telemetry` draws synthetic telemetry from a Config (pure, no I/O);
:func:`write_telemetry` writes a folder of it.
"""

from .frames import COLUMNS, PROBLEM_COLUMNS, FileReport, Telemetry, empty_frame
from .generate import DURATIONS, generate_telemetry, iter_telemetry, parse_durations
from .hours import time_by_local_hour
from .read import read_telemetry, validate_partition
from .schemas import KINDS, OUTCOMES, SCHEMA_DIR, SIGNAL_VALUES, field_names, schema, schema_path
from .write import FORMATS, write_telemetry

__all__ = [
    "COLUMNS", "DURATIONS", "FORMATS", "KINDS", "OUTCOMES", "PROBLEM_COLUMNS", "SCHEMA_DIR", "SIGNAL_VALUES",
    "FileReport", "Telemetry", "empty_frame", "field_names", "generate_telemetry", "iter_telemetry",
    "parse_durations", "read_telemetry", "schema", "schema_path", "time_by_local_hour", "validate_partition",
    "write_telemetry",
]
