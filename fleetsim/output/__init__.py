"""Writing and reading fleetsim's output folders and files, all or nothing.

:mod:`.folders`: the marker, the checks on a target folder, the atomic swap, leftovers;
:mod:`.files`: single files written atomically, safe file names, CSV escaping;
:mod:`.run`: a run folder's files (:func:`write_run`, :func:`read_summary`). The names
below are re-exported here, so ``from fleetsim.output import write_run`` keeps working.
"""

from .files import (
    PARTIAL,
    SAFE_NAME_LENGTH,
    atomic_save,
    atomic_text,
    csv_frame,
    escape_cell,
    inside,
    safe_name,
    unescape_cell,
    unescape_frame,
    write_csv,
)
from .folders import KINDS, MARKER, atomic_folder, check_target, claim_study, clean_leftovers, marker_text, read_marker
from .run import WORKLOADS, event_frame, read_summary, write_run

__all__ = [
    "write_run", "atomic_folder", "atomic_text", "atomic_save", "event_frame", "read_summary", "PARTIAL",
    "MARKER", "KINDS", "read_marker", "marker_text", "check_target", "claim_study", "clean_leftovers",
    "safe_name", "SAFE_NAME_LENGTH", "inside", "escape_cell", "unescape_cell", "csv_frame", "unescape_frame",
    "write_csv", "WORKLOADS",
]
