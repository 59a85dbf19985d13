"""The small storage interface every archive backend implements (SQLite now; a server database later).

Guarantees every backend gives:

- a reading is durably committed before :meth:`Archive.append_reading` returns; the
  returned row (with ``seq`` and ``recorded_at``) is what the UI may show as recorded;
- a failure to commit raises :class:`NotRecordedError` and leaves nothing half-written,
  so the caller can keep the entered value on screen marked "not recorded";
- rows are never updated or deleted; a correction is a new row (see ``schema.py``);
- several processes may write one archive at once.

``pandas`` is imported for type checking only, so that a recording process that only appends
starts without loading it.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Protocol

from labkit.core.errors import LabkitError

if TYPE_CHECKING:
    import pandas as pd


class ArchiveError(LabkitError, RuntimeError):
    """An archive that cannot be opened, is corrupt, or is on a filesystem labkit refuses."""


class NotRecordedError(ArchiveError):
    """A write that did not commit (disk full, read-only, locked too long); nothing was stored."""


class InvalidRowError(NotRecordedError, ValueError):
    """A row that does not fit its table's schema (missing, mistyped or unknown column); nothing was stored."""


@dataclass
class MergeReport:
    """What a merge of hand-in files did."""

    merged_sessions: list[str] = field(default_factory=list)
    merged_rows: int = 0
    duplicates_skipped: int = 0
    refused: list[str] = field(default_factory=list)  # equal ids with different content, with the reason
    competing_corrections: list[str] = field(default_factory=list)  # kept, flagged for the TA


class Archive(Protocol):
    """A logbook archive (one SQLite file, or a server database)."""

    format_version: int

    def create_session(self, session: Mapping[str, Any]) -> None:
        """Store a new session row (``SESSION_COLUMNS``); its id must be new."""

    def append_event(self, event: Mapping[str, Any]) -> Mapping[str, Any]:
        """Append an event (``EVENT_COLUMNS`` less ``seq`` and ``at``, which the archive assigns)."""

    def append_reading(self, reading: Mapping[str, Any]) -> Mapping[str, Any]:
        """Append a reading row (``READING_COLUMNS`` less ``seq`` and ``recorded_at``); return the committed row."""

    def append_readings(self, readings: Sequence[Mapping[str, Any]]) -> list[Mapping[str, Any]]:
        """Append several readings in one transaction: all are committed, or none (imports)."""

    def store_capture(self, session_id: str, name: str, data: bytes) -> str:
        """Store a capture file (compressed) with its session; return its id (content hash)."""

    def load_capture(self, capture_id: str) -> tuple[str, bytes]:
        """The name and bytes of a stored capture."""

    def sessions(self) -> pd.DataFrame:
        """All sessions (``SESSION_COLUMNS``), with their latest state."""

    def readings(self, session_id: str | None = None, *, latest_only: bool = False) -> pd.DataFrame:
        """Reading rows (``READING_COLUMNS`` dtypes), all revisions unless ``latest_only``."""

    def competing_readings(self, session_id: str | None = None) -> pd.DataFrame:
        """Corrections that lost a merge race (``READING_COLUMNS`` plus ``source_file``), kept for the TA."""

    def events(self, session_id: str | None = None) -> pd.DataFrame:
        """Event rows (``EVENT_COLUMNS``)."""

    def roster(self) -> pd.DataFrame:
        """The roster (``ROSTER_COLUMNS``)."""

    def add_roster(self, rows: Sequence[Mapping[str, Any]]) -> None:
        """Add participants to the roster."""

    def hand_in(self, path: str | Path, session_ids: Sequence[str] | None = None) -> Path:
        """Write one self-contained file with the given sessions (all by default) for a TA to collect."""

    def merge(self, paths: Sequence[str | Path]) -> MergeReport:
        """Merge hand-in files in one transaction (see :class:`MergeReport`)."""

    def check(self) -> list[str]:
        """Integrity problems found (empty when the archive is sound)."""

    def close(self) -> None:
        """Release the archive."""
