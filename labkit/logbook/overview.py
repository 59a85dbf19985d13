"""The TA's live section overview (data layer): where every group is, what is outside, ratings, sync attempts.

Built from any archive (the shared server, a local SQLite file) or, offline, from a set of
collected hand-in files (:func:`overview_from_hand_ins`). For each group of a section it takes the
group's latest session and says:

- its state and current step (replayed from the ``step:*`` events, as the session runner does);
- the *outstanding outside* readings: the latest revision of each reading whose verdict is
  ``outside`` (a correction that brings it inside clears it);
- rating warnings: measured ``loading`` above 100 % of rating, and, when ``predicted_ratings`` is on,
  the rating flags of the current step's prediction (the session re-created by
  :meth:`labkit.session.runner.SessionRunner.resume`; cached per session and event count);
- sync attempts: every recorded closing reading (``slip``, ``dphi_sync``, ``dv_sync``) at a
  ``synchronize`` step, in order, with its latest verdict.

:class:`OverviewRefresher` rebuilds it in a background thread so a widget only polls
:meth:`OverviewRefresher.latest` and never waits on the server.
"""

from __future__ import annotations

import json
import math
import threading
import time
import tomllib
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

from labkit.logbook.storage import ArchiveError

if TYPE_CHECKING:
    import pandas as pd

    from labkit.logbook.storage import Archive

SYNC_QUANTITIES = frozenset({"slip", "dphi_sync", "dv_sync"})
"""Closing-moment quantities (labkit.core.quantities): each recorded one at a synchronize step is an attempt."""
STEP_EVENTS = ("step:forward", "step:back", "step:skip")


@dataclass(frozen=True)
class OutsideReading:
    """A reading whose latest revision is outside its band."""

    reading_id: str
    step_id: str
    quantity: str
    location: str
    measured: float
    predicted: float
    band_low: float
    band_high: float
    unit: str
    diagnosis: str
    recorded_by: str
    recorded_at: datetime


@dataclass(frozen=True)
class SyncAttempt:
    """One recorded closing reading at a synchronize step."""

    step_id: str
    quantity: str
    measured: float
    unit: str
    verdict: str
    seq: int
    recorded_at: datetime


@dataclass
class GroupStatus:
    """One group's latest session as the TA sees it."""

    section: str
    group: str
    session_id: str
    kind: str
    state: str
    cart: str
    template_id: str
    step_index: int
    step_id: str
    step_title: str
    n_steps: int
    readings: int
    outside: list[OutsideReading] = field(default_factory=list)
    rating_warnings: list[str] = field(default_factory=list)
    sync_attempts: list[SyncAttempt] = field(default_factory=list)
    last_activity: datetime | None = None
    problems: list[str] = field(default_factory=list)


@dataclass
class SectionOverview:
    """Every group of a section (or of every section the archive shows), built at ``built_at``."""

    source: str
    section: str | None
    groups: list[GroupStatus]
    built_at: datetime
    seconds: float
    problems: list[str] = field(default_factory=list)

    def group(self, section: str, group: str) -> GroupStatus:
        """The status of one group (KeyError naming the groups there are)."""
        for g in self.groups:
            if g.section == section and g.group == group:
                return g
        msg = f"no group {section}/{group}; groups: {', '.join(f'{g.section}/{g.group}' for g in self.groups)}"
        raise KeyError(msg)


def _steps(template_text: str) -> list[tuple[str, str]]:
    """(id, title) of each step of an archived template text (its TOML, without validating the bench)."""
    try:
        data = tomllib.loads(template_text)
    except tomllib.TOMLDecodeError:
        return []
    return [(str(s.get("id", "")), str(s.get("title", ""))) for s in data.get("steps", []) if isinstance(s, dict)]


def current_step(events: pd.DataFrame) -> int:
    """The current step index after a session's step events (the last move's ``to``; 0 before any)."""
    moves = events[events["event"].isin(STEP_EVENTS)].sort_values("seq")
    if moves.empty:
        return 0
    detail = moves.iloc[-1]["detail"]
    try:
        return int(json.loads(detail)["to"])
    except (TypeError, ValueError, KeyError):
        return 0


def _f(value: Any) -> float:
    try:
        out = float(value)
    except (TypeError, ValueError):
        return math.nan
    return out


def _ts(value: Any) -> datetime:
    return value.to_pydatetime() if hasattr(value, "to_pydatetime") else value


class RatingCache:
    """Predicted rating flags of a session's current step, recomputed only when its events change."""

    def __init__(self) -> None:
        self._cache: dict[str, tuple[int, list[str]]] = {}
        self._lock = threading.Lock()

    def flags(self, archive: Archive, session_id: str, n_events: int) -> list[str]:
        """The rating flags of the current step's prediction (re-created session), cached by event count."""
        with self._lock:
            hit = self._cache.get(session_id)
        if hit is not None and hit[0] == n_events:
            return list(hit[1])
        from labkit.session.runner import Actor, SessionRunner

        runner = SessionRunner.resume(archive, session_id, Actor("overview", "ta"))
        view = runner.view()
        flags = list(view.prediction.rating_flags) if view.prediction is not None else []
        with self._lock:
            self._cache[session_id] = (n_events, flags)
        return flags


def section_overview(archive: Archive, section: str | None = None, *, predicted_ratings: bool = False,
                     rating_cache: RatingCache | None = None, source: str = "") -> SectionOverview:
    """The overview of ``section`` (all sections the archive shows when ``None``).

    Parameters
    ----------
    archive
        Any :class:`~labkit.logbook.storage.Archive`; on the shared server the login's row security
        decides what it shows (a TA sees their sections).
    section
        Section id to show, or ``None`` for all.
    predicted_ratings
        Also re-create each open session to get its current step's predicted rating flags (slower;
        cached in ``rating_cache`` between refreshes).
    """
    start = time.perf_counter()
    sessions = archive.sessions()
    if section is not None:
        sessions = sessions[sessions["section"] == section]
    readings = archive.readings(latest_only=True)
    events = archive.events()
    sessions = sessions.sort_values(["section", "group", "created_at"])
    latest = sessions.groupby(["section", "group"], sort=True).tail(1)
    groups: list[GroupStatus] = []
    cache = rating_cache or (RatingCache() if predicted_ratings else None)
    for s in latest.to_dict("records"):
        sid = str(s["session_id"])
        ev = events[events["session_id"] == sid]
        rd = readings[readings["session_id"] == sid]
        steps = _steps(str(s["template_text"]))
        index = current_step(ev)
        step_id, title = steps[index] if 0 <= index < len(steps) else ("", "")
        status = GroupStatus(str(s["section"]), str(s["group"]), sid, str(s["kind"]), str(s["state"]), str(s["cart"]),
                             str(s["template_id"]), index, step_id, title, len(steps), len(rd))
        for r in rd[rd["verdict"] == "outside"].sort_values("seq").to_dict("records"):
            status.outside.append(OutsideReading(
                str(r["reading_id"]), str(r["step_id"]), str(r["quantity"]), str(r["location"]), _f(r["measured"]),
                _f(r["predicted"]), _f(r["band_low"]), _f(r["band_high"]), str(r["unit"]),
                str(r["diagnosis"] or ""), str(r["recorded_by"]), _ts(r["recorded_at"])))
        for r in rd[(rd["quantity"] == "loading") & (rd["measured"] > 100.0)].to_dict("records"):
            status.rating_warnings.append(f"{r['location']} measured at {float(r['measured']):.0f} % of its rated "
                                          f"current (step {r['step_id']})")
        sync = rd[(rd["step_kind"] == "synchronize") & rd["quantity"].isin(list(SYNC_QUANTITIES))]
        for r in sync.sort_values("seq").to_dict("records"):
            status.sync_attempts.append(SyncAttempt(str(r["step_id"]), str(r["quantity"]), _f(r["measured"]),
                                                    str(r["unit"]), str(r["verdict"]), int(r["seq"]),
                                                    _ts(r["recorded_at"])))
        stamps = [_ts(x) for x in (*ev["at"], *rd["recorded_at"])]
        status.last_activity = max(stamps) if stamps else None
        if cache is not None and status.state == "open":
            try:
                status.rating_warnings += [f"predicted: {f}" for f in cache.flags(archive, sid, len(ev))]
            except Exception as exc:  # a session the runner cannot re-create still shows its readings
                status.problems.append(f"no prediction for the current step: {exc}")
        groups.append(status)
    return SectionOverview(source or repr(archive), section, groups, datetime.now(UTC),
                           time.perf_counter() - start)


def overview_from_hand_ins(paths: Sequence[str | Path], section: str | None = None, **options: Any
                           ) -> SectionOverview:
    """The overview offline, from collected hand-in files (merged into a temporary archive, files untouched)."""
    import tempfile

    from labkit.logbook.sqlite import SQLiteArchive

    with tempfile.TemporaryDirectory(prefix="labkit-overview-") as folder:
        scratch = SQLiteArchive(Path(folder) / "overview.sqlite")
        try:
            report = scratch.merge([Path(p) for p in paths])
            out = section_overview(scratch, section, source=f"{len(paths)} hand-in files", **options)
        finally:
            scratch.close()
    out.problems += list(report.refused) + list(report.competing_corrections)
    return out


class OverviewRefresher:
    """Rebuilds an overview in a background thread every ``interval`` seconds; a widget polls :meth:`latest`.

    Parameters
    ----------
    build
        Returns a fresh :class:`SectionOverview` (e.g. ``lambda: section_overview(archive, "S01")``).
    interval
        Seconds between refreshes, s.
    """

    def __init__(self, build: Callable[[], SectionOverview], interval: float = 10.0) -> None:
        if not interval > 0:
            msg = f"refresh interval must be positive, found {interval!r} s"
            raise ValueError(msg)
        self._build = build
        self.interval = float(interval)
        self._latest: SectionOverview | None = None
        self.error = ""
        self.version = 0
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._lock = threading.Lock()
        self._thread: threading.Thread | None = None

    def start(self) -> OverviewRefresher:
        """Start the background thread (idempotent); the first build begins at once."""
        if self._thread is None or not self._thread.is_alive():
            self._stop.clear()
            self._thread = threading.Thread(target=self._run, name="labkit-overview", daemon=True)
            self._thread.start()
        return self

    def _run(self) -> None:
        while not self._stop.is_set():
            try:
                fresh = self._build()
                with self._lock:
                    self._latest, self.error = fresh, ""
                    self.version += 1
            except (ArchiveError, OSError) as exc:  # keep the last good overview, say why it is stale
                with self._lock:
                    self.error = str(exc)
                    self.version += 1
            self._wake.wait(self.interval)
            self._wake.clear()

    def refresh_now(self) -> None:
        """Ask for a rebuild without waiting for it."""
        self._wake.set()

    def latest(self) -> tuple[int, SectionOverview | None, str]:
        """(version, last good overview or None, error of the last attempt or '') without blocking on I/O."""
        with self._lock:
            return self.version, self._latest, self.error

    def wait_for(self, version: int, timeout: float = 10.0) -> bool:
        """Wait until :attr:`version` exceeds ``version`` (tests, scripts); whether it did."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.version > version:
                return True
            time.sleep(0.01)
        return False

    def stop(self, timeout: float = 5.0) -> None:
        """Stop the thread and wait for it."""
        self._stop.set()
        self._wake.set()
        if self._thread is not None:
            self._thread.join(timeout)
            self._thread = None
