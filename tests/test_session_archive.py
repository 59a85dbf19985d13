"""An in-memory archive for the session tests (the storage protocol's guarantees, without a file), and its checks.

The session runner is written against :class:`labkit.logbook.storage.Archive`; these tests run it on
:class:`MemoryArchive`, which keeps the protocol's rules that the runner relies on: the archive assigns
``seq`` (shared by events and readings, per session) and the time, rows are never changed, and a failed
commit raises :class:`NotRecordedError` and stores nothing.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Mapping, Sequence
from typing import Any

import pandas as pd
import pytest

from labkit.logbook.schema import EVENT_COLUMNS, READING_COLUMNS, ROSTER_COLUMNS, SESSION_COLUMNS, column_names
from labkit.logbook.storage import NotRecordedError


class MemoryArchive:
    """Archive protocol in memory; ``fail_next`` makes the next reading commits raise NotRecordedError."""

    format_version = 1

    def __init__(self) -> None:
        self._sessions: list[dict[str, Any]] = []
        self._events: list[dict[str, Any]] = []
        self._readings: list[dict[str, Any]] = []
        self._roster: list[dict[str, Any]] = []
        self._captures: dict[str, tuple[str, bytes]] = {}
        self._seq: dict[str, int] = {}
        self.fail_next = 0

    def _next(self, session_id: str) -> int:
        if session_id not in {s["session_id"] for s in self._sessions}:
            raise NotRecordedError(f"unknown session {session_id}")
        self._seq[session_id] = self._seq.get(session_id, 0) + 1
        return self._seq[session_id]

    def create_session(self, session: Mapping[str, Any]) -> None:
        missing = set(column_names(SESSION_COLUMNS)) - set(session)
        assert not missing, missing
        assert session["session_id"] not in {s["session_id"] for s in self._sessions}
        self._sessions.append(dict(session))

    def append_event(self, event: Mapping[str, Any]) -> Mapping[str, Any]:
        row = {**event, "seq": self._next(event["session_id"]), "at": pd.Timestamp.now(tz="UTC")}
        assert set(row) == set(column_names(EVENT_COLUMNS)), set(row) ^ set(column_names(EVENT_COLUMNS))
        self._events.append(row)
        return dict(row)

    def append_reading(self, reading: Mapping[str, Any]) -> Mapping[str, Any]:
        if self.fail_next > 0:
            self.fail_next -= 1
            raise NotRecordedError("disk full (simulated)")
        expected = set(column_names(READING_COLUMNS)) - {"seq", "recorded_at"}
        assert set(reading) == expected, set(reading) ^ expected
        if reading["revision"] > 0:
            assert reading["reason"], "a correction needs its reason"
        row = {**reading, "seq": self._next(reading["session_id"]), "recorded_at": pd.Timestamp.now(tz="UTC")}
        self._readings.append(row)
        return dict(row)

    def store_capture(self, session_id: str, name: str, data: bytes) -> str:
        cid = hashlib.sha256(data).hexdigest()
        self._captures[cid] = (name, bytes(data))
        return cid

    def load_capture(self, capture_id: str) -> tuple[str, bytes]:
        return self._captures[capture_id]

    def sessions(self) -> pd.DataFrame:
        frame = pd.DataFrame(self._sessions, columns=column_names(SESSION_COLUMNS))
        for k, s in frame.iterrows():
            states = [e["event"] for e in self._events if e["session_id"] == s["session_id"]
                      and e["event"].startswith("state:")]
            if states:
                frame.loc[k, "state"] = states[-1].partition(":")[2]
        return frame

    def readings(self, session_id: str | None = None, *, latest_only: bool = False) -> pd.DataFrame:
        rows = [r for r in self._readings if session_id is None or r["session_id"] == session_id]
        frame = pd.DataFrame(rows, columns=column_names(READING_COLUMNS))
        if latest_only and not frame.empty:
            frame = frame.sort_values("revision").drop_duplicates("reading_id", keep="last").sort_values("seq")
        return frame

    def events(self, session_id: str | None = None) -> pd.DataFrame:
        rows = [e for e in self._events if session_id is None or e["session_id"] == session_id]
        return pd.DataFrame(rows, columns=column_names(EVENT_COLUMNS))

    def roster(self) -> pd.DataFrame:
        return pd.DataFrame(self._roster, columns=column_names(ROSTER_COLUMNS))

    def add_roster(self, rows: Sequence[Mapping[str, Any]]) -> None:
        self._roster += [dict(r) for r in rows]

    def check(self) -> list[str]:
        return []

    def close(self) -> None:
        pass


def test_memory_archive_assigns_one_sequence_per_session_and_refuses_when_failing():
    arch = MemoryArchive()
    arch.create_session({c: "" for c in column_names(SESSION_COLUMNS)} | {"session_id": "s1"})
    e = arch.append_event({"session_id": "s1", "by": "p1", "role": "student", "event": "state:open",
                           "step_id": "", "detail": json.dumps({})})
    assert e["seq"] == 1
    arch.fail_next = 1
    with pytest.raises(NotRecordedError):
        arch.append_reading({})
    assert arch.readings("s1").empty
    assert arch.sessions().iloc[0]["state"] == "open"
