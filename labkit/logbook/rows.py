"""Checking logbook rows against ``schema.py`` and putting them in storage form (no pandas, no pyarrow).

A row in *storage form* is a tuple of plain Python values in the table's column order:
``str`` for strings (``""`` for an absent optional one), ``int`` for int64 and boolean,
``float`` or ``None`` (NaN) for float64, and ``int`` nanoseconds since the Unix epoch (UTC)
for datetimes. Every row also carries ``row_sha256``: the SHA-256 of its canonical JSON,
which hand-in merges compare to tell a duplicate from a conflicting row.

The writing path of the archive imports only this module and :mod:`sqlite3`, so a recording
process starts fast and a reading is checked the same way whether it was typed or imported.
"""

from __future__ import annotations

import hashlib
import json
import math
import numbers
import re
from collections.abc import Iterable, Mapping
from datetime import UTC, datetime, timedelta
from typing import Any

from labkit.logbook.schema import (
    EVENT_COLUMNS,
    FORMS,
    OBTAINED,
    READING_COLUMNS,
    ROLES,
    ROSTER_COLUMNS,
    SESSION_COLUMNS,
    SESSION_KINDS,
    SESSION_STATES,
    VERDICTS,
    Column,
)
from labkit.logbook.storage import InvalidRowError

TABLES: dict[str, tuple[Column, ...]] = {
    "readings": READING_COLUMNS,
    "sessions": SESSION_COLUMNS,
    "events": EVENT_COLUMNS,
    "roster": ROSTER_COLUMNS,
}

ASSIGNED: dict[str, frozenset[str]] = {  # columns the archive fills in, never the caller
    "readings": frozenset({"seq", "recorded_at"}),
    "events": frozenset({"seq", "at"}),
    "sessions": frozenset(),
    "roster": frozenset(),
}

STATE_EVENTS = tuple(f"state:{s}" for s in SESSION_STATES)
CONFLICT_EVENT = "merge:conflict"
_SHA256 = re.compile(r"^[0-9a-f]{64}$")
_EPOCH = datetime(1970, 1, 1, tzinfo=UTC)


class CellProblem(ValueError):
    """One bad value: the column and what was wrong (collected into an :class:`InvalidRowError`)."""

    def __init__(self, column: str, message: str) -> None:
        super().__init__(f"{column}: {message}")
        self.column = column
        self.message = message


def now_ns() -> int:
    """The current UTC time as nanoseconds since the epoch, rounded to whole microseconds.

    Microseconds so that the ``datetime`` handed back by an append equals the stored value exactly.
    """
    return time_ns() // 1000 * 1000


def time_ns() -> int:
    """Nanoseconds since the epoch (the recording machine's clock)."""
    import time

    return time.time_ns()


def ns_to_datetime(ns: int) -> datetime:
    """A stored nanosecond timestamp as an aware UTC ``datetime`` (microsecond resolution)."""
    return _EPOCH + timedelta(microseconds=ns // 1000)


def _describe(value: Any) -> str:
    text = repr(value)
    return (text[:40] + "...") if len(text) > 43 else text + f" ({type(value).__name__})"


def coerce(value: Any, column: Column, *, from_text: bool = False) -> Any:
    """One value in storage form, or :class:`CellProblem` saying what was expected.

    Parameters
    ----------
    value
        The value as given (``None`` for a missing one).
    column
        Its schema column.
    from_text
        Accept text for numbers, booleans and datetimes too (imported files); typed rows must
        give native values so that a programming slip does not pass as a reading.
    """
    name, dtype = column.name, column.dtype
    if isinstance(value, str) and from_text and dtype != "string":
        text = value.strip()
        value = None if text == "" else _parse_text(text, column)
    if value is None or (isinstance(value, float) and math.isnan(value) and dtype != "float64"):
        if dtype == "float64":
            return None
        if not column.required:
            return "" if dtype == "string" else None
        raise CellProblem(name, f"required value missing; expected {_EXPECTED[dtype]}")
    if dtype == "string":
        if not isinstance(value, str):
            raise CellProblem(name, f"expected text, found {_describe(value)}")
        if column.required and not value.strip():
            raise CellProblem(name, "required value missing (empty text)")
        if "\x00" in value:
            raise CellProblem(name, "text holds a NUL character")
        return value
    if dtype == "int64":
        if isinstance(value, bool) or not isinstance(value, numbers.Integral | float):
            raise CellProblem(name, f"expected an integer, found {_describe(value)}")
        if isinstance(value, float) and not value.is_integer():
            raise CellProblem(name, f"expected an integer, found {_describe(value)}")
        out = int(value)
        if not -2**63 <= out < 2**63:
            raise CellProblem(name, f"integer {out} does not fit in int64")
        return out
    if dtype == "float64":
        if isinstance(value, bool) or not isinstance(value, numbers.Real):
            raise CellProblem(name, f"expected a number, found {_describe(value)}")
        out_f = float(value)
        return None if math.isnan(out_f) else out_f
    if dtype == "boolean":
        if not isinstance(value, bool) and type(value).__name__ != "bool_":
            raise CellProblem(name, f"expected true or false, found {_describe(value)}")
        return int(bool(value))
    return _datetime_ns(value, name)


_EXPECTED = {"string": "text", "int64": "an integer", "float64": "a number", "boolean": "true or false",
             "datetime64[ns, UTC]": "a UTC date and time"}


def _parse_text(text: str, column: Column) -> Any:
    dtype = column.dtype
    try:
        if dtype == "int64":
            return int(float(text)) if re.fullmatch(r"[+-]?\d+(\.0*)?", text) else int(text)
        if dtype == "float64":
            if text.lower() in ("nan", "na", "n/a"):
                return math.nan
            return float(text)
        if dtype == "boolean":
            lowered = text.lower()
            if lowered in ("true", "1", "yes"):
                return True
            if lowered in ("false", "0", "no"):
                return False
            raise ValueError(text)
    except ValueError:
        msg = f"expected {_EXPECTED[dtype]}, found {text!r}"
        raise CellProblem(column.name, msg) from None
    return text  # datetimes are parsed by _datetime_ns


def _datetime_ns(value: Any, name: str) -> int:
    if isinstance(value, str):
        text = value.strip().replace("Z", "+00:00") if value.strip().endswith("Z") else value.strip()
        try:
            value = datetime.fromisoformat(text)
        except ValueError:
            msg = f"expected an ISO 8601 date and time with its UTC offset, found {value!r}"
            raise CellProblem(name, msg) from None
    if hasattr(value, "value") and hasattr(value, "tzinfo") and type(value).__name__ == "Timestamp":
        if value.tzinfo is None:
            msg = f"naive timestamp {value}; give the UTC offset (the log keeps UTC)"
            raise CellProblem(name, msg)
        return int(value.value)
    if isinstance(value, datetime):
        if value.tzinfo is None or value.utcoffset() is None:
            msg = f"naive date and time {value.isoformat()}; give the UTC offset (the log keeps UTC)"
            raise CellProblem(name, msg)
        delta = value - _EPOCH
        return (delta.days * 86_400 + delta.seconds) * 1_000_000_000 + delta.microseconds * 1000
    if type(value).__name__ == "datetime64":
        msg = f"numpy datetime64 {value} has no UTC offset; give an aware datetime"
        raise CellProblem(name, msg)
    msg = f"expected a UTC date and time, found {_describe(value)}"
    raise CellProblem(name, msg)


def _check_choice(values: dict[str, Any], name: str, choices: Iterable[str], problems: list[CellProblem]) -> None:
    value = values.get(name)
    if isinstance(value, str) and value not in choices:
        problems.append(CellProblem(name, f"expected one of {', '.join(choices)}, found {value!r}"))


def _sha256_text(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _table_rules(table: str, values: dict[str, Any], problems: list[CellProblem]) -> None:
    """The rules of each table beyond dtypes (allowed words, revision chain shape, text hashes)."""
    if table == "readings":
        _check_choice(values, "verdict", VERDICTS, problems)
        _check_choice(values, "form", FORMS, problems)
        _check_choice(values, "obtained", OBTAINED, problems)
        rev, sup = values.get("revision"), values.get("supersedes")
        if isinstance(rev, int):
            if rev < 0:
                problems.append(CellProblem("revision", f"must be 0 or more, found {rev}"))
            elif isinstance(sup, int) and sup != rev - 1:
                problems.append(CellProblem("supersedes", f"revision {rev} supersedes revision {rev - 1}, "
                                                          f"found {sup}"))
            if rev > 0 and not str(values.get("reason") or "").strip():
                problems.append(CellProblem("reason", f"a correction (revision {rev}) needs a reason"))
        if isinstance(values.get("step_index"), int) and values["step_index"] < 0:
            problems.append(CellProblem("step_index", f"must be 0 or more, found {values['step_index']}"))
    elif table == "sessions":
        _check_choice(values, "kind", SESSION_KINDS, problems)
        _check_choice(values, "state", SESSION_STATES, problems)
        for what in ("template", "bench", "cart"):
            text, digest = values.get(f"{what}_text"), values.get(f"{what}_sha256")
            if not isinstance(text, str) or not isinstance(digest, str):
                continue
            if what == "cart" and text == "" and digest == "":
                continue
            if not _SHA256.match(digest):
                problems.append(CellProblem(f"{what}_sha256", f"expected 64 lowercase hex digits, found {digest!r}"))
            elif digest != _sha256_text(text):
                problems.append(CellProblem(f"{what}_sha256", f"does not match the SHA-256 of {what}_text"))
        people = values.get("people")
        if isinstance(people, str):
            try:
                parsed = json.loads(people)
            except ValueError:
                parsed = None
            if not isinstance(parsed, list) or not all(isinstance(p, str) for p in parsed):
                problems.append(CellProblem("people", f"expected a JSON list of ids, found {people!r}"))
        for key in ("mc_samples", "mc_seed"):
            if isinstance(values.get(key), int) and values[key] < 0:
                problems.append(CellProblem(key, f"must be 0 or more, found {values[key]}"))
    elif table == "events":
        _check_choice(values, "role", ROLES, problems)
        event = values.get("event")
        if isinstance(event, str) and event.startswith("state:") and event not in STATE_EVENTS:
            problems.append(CellProblem("event", f"expected one of {', '.join(STATE_EVENTS)}, found {event!r}"))
        detail = values.get("detail")
        if isinstance(detail, str) and detail:
            try:
                json.loads(detail)
            except ValueError:
                problems.append(CellProblem("detail", f"expected JSON text, found {detail[:40]!r}"))
    elif table == "roster":
        _check_choice(values, "role", ROLES, problems)


def check_row(table: str, row: Mapping[str, Any], *, from_text: bool = False,
              defaults: Mapping[str, Any] | None = None) -> tuple[dict[str, Any], list[CellProblem]]:
    """The row's values in storage form (assigned columns left out) and every problem found.

    Unknown keys and assigned columns given by the caller are problems too: a misspelt
    column must not silently vanish from the record.
    """
    columns = TABLES[table]
    known = {c.name for c in columns}
    assigned = ASSIGNED[table]
    problems: list[CellProblem] = []
    for key in row:
        if key in assigned:
            problems.append(CellProblem(str(key), "is assigned by the archive; leave it out"))
        elif key not in known:
            problems.append(CellProblem(str(key), f"unknown column of {table}"))
    values: dict[str, Any] = {}
    for column in columns:
        if column.name in assigned:
            continue
        if column.name in row:
            raw = row[column.name]
        elif defaults and column.name in defaults:
            raw = defaults[column.name]
        elif column.required and column.dtype != "float64":
            problems.append(CellProblem(column.name, f"required column missing; expected {_EXPECTED[column.dtype]}"))
            continue
        else:
            raw = None
        try:
            values[column.name] = coerce(raw, column, from_text=from_text)
        except CellProblem as problem:
            problems.append(problem)
    _table_rules(table, values, problems)
    return values, problems


def storage_row(table: str, row: Mapping[str, Any], *, defaults: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """The checked row in storage form; :class:`InvalidRowError` listing every problem otherwise."""
    values, problems = check_row(table, row, defaults=defaults)
    if problems:
        ident = row.get("reading_id") or row.get("session_id") or row.get("participant_id") or ""
        what = f"{table[:-1]} {ident}".strip()
        msg = f"{what} not recorded: " + "; ".join(str(p) for p in problems)
        raise InvalidRowError(msg)
    return values


def canonical(value: Any) -> Any:
    """A storage value as it enters the row hash (NaN and None are the same absent value)."""
    if isinstance(value, float) and math.isnan(value):
        return None
    return value


def row_hash(table: str, values: Mapping[str, Any] | tuple[Any, ...]) -> str:
    """SHA-256 of a complete storage row (all schema columns, in order) as canonical JSON."""
    columns = TABLES[table]
    ordered = values if isinstance(values, tuple) else tuple(values[c.name] for c in columns)
    if len(ordered) != len(columns):
        msg = f"row of {table} has {len(ordered)} values, expected {len(columns)}"
        raise ValueError(msg)
    text = json.dumps([canonical(v) for v in ordered], ensure_ascii=False, separators=(",", ":"),
                      allow_nan=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def public_row(table: str, values: Mapping[str, Any]) -> dict[str, Any]:
    """A storage row as handed back to callers: datetimes as aware UTC ``datetime``, NaN for absent floats."""
    out: dict[str, Any] = {}
    for column in TABLES[table]:
        value = values[column.name]
        if column.dtype == "datetime64[ns, UTC]" and value is not None:
            value = ns_to_datetime(int(value))
        elif column.dtype == "float64" and value is None:
            value = math.nan
        elif column.dtype == "boolean" and value is not None:
            value = bool(value)
        out[column.name] = value
    return out
