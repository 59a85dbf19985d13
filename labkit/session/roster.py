"""Roster import: one CSV of participants creates a section's sessions in one batch.

The CSV has the header ``participant_id,name,section,group,role`` (``role`` is student, ta or
instructor; ``group`` may be empty for staff). Names go only to the roster table; sessions
and readings carry the pseudonymous ``participant_id``. Every problem of the file is reported
together, each with its line.
"""

from __future__ import annotations

import csv
import io
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING

from labkit.core.errors import FileValidationError, Problem
from labkit.logbook.schema import ROLES

if TYPE_CHECKING:
    from labkit.files.loader import LoadedBench, LoadedTemplate
    from labkit.logbook.storage import Archive
    from labkit.session.runner import Actor, SessionRunner

ROSTER_HEADER = ("participant_id", "name", "section", "group", "role")


def read_roster(source: str | Path, *, name: str | None = None) -> list[dict[str, str]]:
    """Read and check a roster CSV (a path, or the CSV text itself when ``name`` is given).

    Raises
    ------
    FileValidationError
        Wrong header, empty ids, unknown roles, a student without a group, an id used twice.
    """
    if name is None:
        path = Path(source)
        try:
            text = path.read_text(encoding="utf-8-sig")
        except OSError as exc:
            raise FileValidationError([Problem(str(path), 0, (), f"cannot read roster: {exc.strerror}")]) from exc
        name = str(path)
    else:
        text = str(source)
    reader = csv.reader(io.StringIO(text))
    rows = list(reader)
    if not rows or tuple(c.strip() for c in rows[0]) != ROSTER_HEADER:
        found = ",".join(rows[0]) if rows else "an empty file"
        raise FileValidationError([Problem(name, 1, (), "roster header", ",".join(ROSTER_HEADER), found)])
    problems: list[Problem] = []
    out: list[dict[str, str]] = []
    seen: dict[str, int] = {}
    for line, cells in enumerate(rows[1:], start=2):
        if not any(c.strip() for c in cells):
            continue
        if len(cells) != len(ROSTER_HEADER):
            problems.append(Problem(name, line, (), "wrong number of columns", f"{len(ROSTER_HEADER)} columns",
                                    f"{len(cells)}"))
            continue
        row = dict(zip(ROSTER_HEADER, (c.strip() for c in cells), strict=True))
        for key in ("participant_id", "name", "section"):
            if not row[key]:
                problems.append(Problem(name, line, (key,), f"empty {key}", f"a {key}"))
        if row["role"] not in ROLES:
            problems.append(Problem(name, line, ("role",), "unknown role", " or ".join(ROLES), repr(row["role"])))
        if row["role"] == "student" and not row["group"]:
            problems.append(Problem(name, line, ("group",), "a student needs a group", "a group id"))
        pid = row["participant_id"]
        if pid in seen:
            problems.append(Problem(name, line, ("participant_id",), f'participant id "{pid}" already used on line '
                                    f"{seen[pid]}", "a unique id"))
        seen.setdefault(pid, line)
        out.append(row)
    if problems:
        raise FileValidationError(problems)
    return out


def import_roster(archive: Archive, roster: str | Path | Sequence[Mapping[str, str]], bench: LoadedBench,
                  template: LoadedTemplate, *, section: str, actor: Actor, carts: Mapping[str, str] | None = None,
                  kind: str = "lab", n_samples: int | None = None, seed: int | None = None) -> list[SessionRunner]:
    """Add a roster's participants to the archive and create one planned session per group of ``section``.

    Parameters
    ----------
    roster
        A roster CSV path, or rows as :func:`read_roster` gives them.
    bench, template
        What every session of the batch runs.
    section
        The section whose groups get sessions (other sections' participants are added to the roster only).
    actor
        Who creates the sessions (staff).
    carts
        Group id -> cart id; groups not in it get the bench's cart.
    """
    from labkit.core.predict import DEFAULT_SAMPLES, DEFAULT_SEED
    from labkit.session.runner import STAFF, SessionError, SessionRunner

    if actor.role not in STAFF:
        msg = f"{actor.id} ({actor.role}) cannot create a section's sessions: staff (ta, instructor) only"
        raise SessionError(msg)
    rows = read_roster(roster) if isinstance(roster, str | Path) else [dict(r) for r in roster]
    existing = archive.roster()
    known = set(existing["participant_id"]) if not existing.empty else set()
    archive.add_roster([r for r in rows if r["participant_id"] not in known])
    groups: dict[str, list[str]] = {}
    for r in rows:
        if r["section"] == section and r["role"] == "student":
            groups.setdefault(r["group"], []).append(r["participant_id"])
    if not groups:
        msg = f'the roster has no students in section "{section}"'
        raise SessionError(msg)
    return [SessionRunner.create(archive, bench, template, section=section, group=group, people=people,
                                 actor=actor, cart=(carts or {}).get(group), kind=kind,
                                 n_samples=DEFAULT_SAMPLES if n_samples is None else n_samples,
                                 seed=DEFAULT_SEED if seed is None else seed)
            for group, people in sorted(groups.items())]
