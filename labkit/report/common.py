"""What the session report, the pre-lab sheet and the review share: errors, files of a session, log helpers."""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from labkit.core.bench import Bench
from labkit.core.errors import LabkitError
from labkit.core.quantities import is_registered, quantity
from labkit.core.template import SessionTemplate
from labkit.logbook.schema import READING_COLUMNS, SESSION_COLUMNS, column_names

Progress = Callable[[int, int, str], None]
"""``progress(done, total, what)``: called as a long job advances."""


class ReportError(LabkitError, ValueError):
    """Report input that cannot be used: a missing session, columns missing from a table, a bad filter."""


def no_progress(done: int, total: int, what: str) -> None:
    """The default progress callback: report nothing."""
    del done, total, what


def require_columns(frame: pd.DataFrame, names: list[str], what: str) -> None:
    """Raise :class:`ReportError` naming the columns a table lacks."""
    missing = [c for c in names if c not in frame.columns]
    if missing:
        msg = f"{what}: missing column(s) {', '.join(missing)}; expected the columns of labkit.logbook.schema"
        raise ReportError(msg)


REQUIRED_READING = [c.name for c in READING_COLUMNS if c.required]
REQUIRED_SESSION = [c.name for c in SESSION_COLUMNS if c.required]


@dataclass(frozen=True)
class SessionFiles:
    """The bench and template a session was run with, rebuilt from the texts stored with it."""

    bench: Bench
    template: SessionTemplate
    hash_problems: tuple[str, ...] = ()


def session_files(session: Mapping[str, Any]) -> SessionFiles:
    """Rebuild and validate the bench (with its cart) and template from a session row's stored texts.

    Stored SHA-256 values are checked against the texts; a mismatch is reported, not hidden.
    """
    from labkit.files.loader import SourceText, bench_from_data, parse_toml, template_from_data

    sid = session.get("session_id", "?")
    problems = []
    for text_key, sha_key in (("bench_text", "bench_sha256"), ("template_text", "template_sha256"),
                              ("cart_text", "cart_sha256")):
        text, sha = session.get(text_key) or "", session.get(sha_key) or ""
        if text and sha and hashlib.sha256(text.encode()).hexdigest() != sha:
            problems.append(f"{text_key} does not match its stored {sha_key}")
    bench_text = session.get("bench_text") or ""
    template_text = session.get("template_text") or ""
    if not bench_text or not template_text:
        msg = f"session {sid}: the stored bench_text and template_text are needed to rebuild its plan"
        raise ReportError(msg)
    src = SourceText(f"session {sid} bench", bench_text)
    data, positions = parse_toml(src)
    cart_text = session.get("cart_text") or ""
    cart = SourceText(f"session {sid} cart", cart_text) if cart_text else None
    bench = bench_from_data(src, data, positions, cart).bench
    tsrc = SourceText(f"session {sid} template", template_text)
    tdata, tpos = parse_toml(tsrc)
    template = template_from_data(tsrc, tdata, tpos, bench).template
    return SessionFiles(bench, template, tuple(problems))


def latest_revisions(readings: pd.DataFrame) -> pd.DataFrame:
    """The newest revision of every reading (highest ``revision`` per ``reading_id``), in ``seq`` order."""
    if readings.empty:
        return readings
    idx = readings.groupby("reading_id", sort=False, observed=True)["revision"].idxmax()
    return readings.loc[idx.to_numpy()].sort_values(["seq"], kind="stable")


def relative_error(measured: pd.Series | np.ndarray, predicted: pd.Series | np.ndarray) -> np.ndarray:
    """``(measured - predicted) / |predicted|``; NaN where the prediction is 0 or either value is missing."""
    m = np.asarray(measured, dtype=float)
    p = np.asarray(predicted, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = (m - p) / np.abs(p)
    out[~np.isfinite(out)] = np.nan
    return out


def is_angle_quantity(name: str) -> bool:
    """True for angle quantities, whose deviation is told in degrees rather than relative to the value."""
    return is_registered(name) and quantity(name).kind == "angle"


def unit_of(name: str) -> str:
    """Registered unit of a quantity name (empty for an unknown name)."""
    return quantity(name).unit if is_registered(name) else ""


def reading_frame(rows: list[Mapping[str, Any]]) -> pd.DataFrame:
    """Reading rows as a DataFrame with the schema's columns and dtypes (for callers building logs by hand)."""
    from labkit.logbook.schema import dtypes

    frame = pd.DataFrame(list(rows), columns=column_names(READING_COLUMNS))
    types = dtypes(READING_COLUMNS)
    for col, dtype in types.items():
        if dtype == "datetime64[ns, UTC]":
            frame[col] = pd.to_datetime(frame[col], utc=True)
        elif dtype in ("int64", "float64"):
            frame[col] = frame[col].astype(dtype)
        elif dtype == "string":
            frame[col] = frame[col].astype("string")
    return frame
