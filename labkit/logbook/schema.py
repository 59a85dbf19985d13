"""The logbook's tables as data: one schema per table, with dtypes, units and meaning.

Everything that writes or reads the log (the SQLite archive, exports, the
session runner, reports) takes its columns from here; ``docs/logbook.md``
documents them. The log is append-only: a correction is a new row of the same
``reading_id`` with ``revision`` + 1, its ``reason`` and ``supersedes`` set;
nothing is overwritten or deleted.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

FORMAT_VERSION = 1
"""Version of the archive's on-disk layout; migrations move older archives up in order."""

Dtype = Literal["string", "int64", "float64", "boolean", "datetime64[ns, UTC]"]


@dataclass(frozen=True)
class Column:
    """One column of a logbook table."""

    name: str
    dtype: Dtype
    description: str
    required: bool = True


def _c(name: str, dtype: Dtype, description: str, required: bool = True) -> Column:
    return Column(name, dtype, description, required)


READING_COLUMNS: tuple[Column, ...] = (
    _c("reading_id", "string", "stable id of the reading (uuid4 hex); shared by all its revisions"),
    _c("revision", "int64", "0 for the first record, +1 per correction; (reading_id, revision) is unique"),
    _c("supersedes", "int64", "revision this row corrects (-1 for the first record)"),
    _c("session_id", "string", "the session the reading belongs to"),
    _c("section", "string", "course section id"),
    _c("group", "string", "student group id within the section"),
    _c("cart", "string", "cart id of the bench used"),
    _c("step_id", "string", "stable step id from the template"),
    _c("step_index", "int64", "0-based position of the step in the template"),
    _c("step_kind", "string", "source_start, synchronize, configure_lines, load_step, line_outage, calibration, "
                              "free_reading"),
    _c("location", "string", "location in the location grammar (bus, ELEMENT@BUS, element, sensor:ID)"),
    _c("quantity", "string", "registered quantity name (labkit.core.quantities)"),
    _c("unit", "string", "unit of predicted, band and measured values (the quantity's registry unit)"),
    _c("predicted", "float64", "nominal prediction, in the sensor's reference direction"),
    _c("band_low", "float64", "5th percentile of the tolerance band"),
    _c("band_high", "float64", "95th percentile of the tolerance band"),
    _c("tolerance", "float64", "instrument or template tolerance applied by the verdict rule, in unit"),
    _c("measured", "float64", "measured value converted to unit and to RMS (NaN if not a number)"),
    _c("entered", "string", "the text as typed (or the capture analysis summary)"),
    _c("form", "string", "rms, peak, peak_to_peak or average (what the instrument gave)"),
    _c("meter_range", "float64", "range of the meter, in unit (NaN if not given)", required=False),
    _c("obtained", "string", "typed, capture, simulated or imported"),
    _c("sensor", "string", "sensor id, if a bench sensor took the reading", required=False),
    _c("verdict", "string", "accept, marginal, outside or unchecked"),
    _c("diagnosis", "string", "the most likely mistake and its evidence, or empty", required=False),
    _c("diagnosis_code", "string", "machine-readable diagnosis class, or empty", required=False),
    _c("anchor", "string", "what the prediction was anchored on (nominal, or as-found source values)"),
    _c("capture_id", "string", "id of the stored capture the reading came from, or empty", required=False),
    _c("recorded_at", "datetime64[ns, UTC]", "when the row was committed (UTC, the recording machine's clock)"),
    _c("seq", "int64", "per-session sequence number (orders rows when offline clocks drift)"),
    _c("recorded_by", "string", "participant or staff id who recorded it"),
    _c("reason", "string", "reason of a correction (required when revision > 0)", required=False),
    _c("note", "string", "free note", required=False),
)

SESSION_COLUMNS: tuple[Column, ...] = (
    _c("session_id", "string", "session id (uuid4 hex)"),
    _c("kind", "string", "lab, practice or demo (practice and demo stay out of review statistics by default)"),
    _c("state", "string", "planned, open, submitted or closed (latest state; transitions are events)"),
    _c("section", "string", "course section id"),
    _c("group", "string", "student group id"),
    _c("cart", "string", "cart id"),
    _c("people", "string", "JSON list of pseudonymous participant ids present"),
    _c("template_id", "string", "template id"),
    _c("template_version", "string", "template version"),
    _c("template_sha256", "string", "SHA-256 of the template text"),
    _c("template_text", "string", "full template text as loaded"),
    _c("bench_id", "string", "bench type id"),
    _c("bench_version", "string", "bench type version"),
    _c("bench_sha256", "string", "SHA-256 of the bench type text"),
    _c("bench_text", "string", "full bench type text"),
    _c("cart_sha256", "string", "SHA-256 of the cart override text, or empty", required=False),
    _c("cart_text", "string", "full cart override text, or empty", required=False),
    _c("labkit_version", "string", "labkit version that created the session"),
    _c("mc_seed", "int64", "Monte Carlo seed of the tolerance bands"),
    _c("mc_samples", "int64", "Monte Carlo sample count of the tolerance bands"),
    _c("created_at", "datetime64[ns, UTC]", "creation time (UTC)"),
    _c("created_by", "string", "who created it"),
)

EVENT_COLUMNS: tuple[Column, ...] = (
    _c("session_id", "string", "session id"),
    _c("seq", "int64", "per-session sequence number, shared with readings"),
    _c("at", "datetime64[ns, UTC]", "when (UTC)"),
    _c("by", "string", "who"),
    _c("role", "string", "student, ta or instructor"),
    _c("event", "string", "state:open, state:submitted, state:closed, step:forward, step:back, step:skip, "
                          "anchor, calibration, note, merge:conflict"),
    _c("step_id", "string", "step concerned, or empty", required=False),
    _c("detail", "string", "JSON detail (reason of a skip, calibration corrections, as-found values)",
       required=False),
)

ROSTER_COLUMNS: tuple[Column, ...] = (
    _c("participant_id", "string", "pseudonymous id used everywhere else"),
    _c("name", "string", "display name (personal data: kept only in this table)"),
    _c("section", "string", "section id"),
    _c("group", "string", "group id", required=False),
    _c("role", "string", "student, ta or instructor"),
)

VERDICTS = ("accept", "marginal", "outside", "unchecked")
FORMS = ("rms", "peak", "peak_to_peak", "average")
OBTAINED = ("typed", "capture", "simulated", "imported")
SESSION_STATES = ("planned", "open", "submitted", "closed")
SESSION_KINDS = ("lab", "practice", "demo")
ROLES = ("student", "ta", "instructor")


def column_names(columns: tuple[Column, ...]) -> list[str]:
    """Names of a table's columns, in order."""
    return [c.name for c in columns]


def dtypes(columns: tuple[Column, ...]) -> dict[str, str]:
    """pandas dtypes of a table's columns."""
    return {c.name: c.dtype for c in columns}
