"""The working folder as the widgets see it: files to choose from, the archive, the last session.

Plain Python (no widget library): the views ask it for choices and hand it what to remember, so the
same logic is testable without a front end.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from labkit.core.errors import LabkitError

if TYPE_CHECKING:
    from labkit.files.loader import LoadedBench, LoadedTemplate
    from labkit.logbook.sqlite import SQLiteArchive

ARCHIVE_NAME = "labkit-archive.sqlite"
CAPTURE_SUFFIXES = (".csv", ".txt", ".npz", ".wav", ".cfg")
ARCHIVE_SUFFIXES = (".sqlite", ".labkit", ".db")
LAST_SESSION = "last-session.json"


class WorkspaceError(LabkitError, ValueError):
    """A file choice the working folder cannot satisfy (missing, unreadable, wrong kind)."""


@dataclass(frozen=True)
class FileChoice:
    """A file offered in a dropdown: its label (where it comes from) and its path."""

    label: str
    path: Path


class Workspace:
    """One working folder (``labkit lab``'s, or any folder a notebook names).

    Parameters
    ----------
    folder
        The working folder; ``captures/``, ``reports/``, ``archive/`` and ``.labkit/`` are created in it.
    demo_folder
        Where the demo bench and templates are (default: labkit's own).
    """

    def __init__(self, folder: str | Path, demo_folder: str | Path | None = None) -> None:
        from labkit.demo_files import demo_folder as default_demo

        self.folder = Path(folder).expanduser().resolve()
        if not self.folder.is_dir():
            msg = f"{self.folder}: the working folder does not exist"
            raise WorkspaceError(msg)
        self.demo_folder = Path(demo_folder).resolve() if demo_folder else default_demo()
        for sub in ("captures", "reports", "archive", ".labkit"):
            (self.folder / sub).mkdir(exist_ok=True)
        self._archive: SQLiteArchive | None = None

    # -- folders -------------------------------------------------------------------------------------
    @property
    def captures(self) -> Path:
        """Where capture files are picked from (and uploads are kept)."""
        return self.folder / "captures"

    @property
    def reports(self) -> Path:
        """Where exported reports and pre-lab sheets go."""
        return self.folder / "reports"

    @property
    def archive_path(self) -> Path:
        """The local archive file."""
        return self.folder / "archive" / ARCHIVE_NAME

    # -- bench and template files --------------------------------------------------------------------
    def toml_files(self) -> list[FileChoice]:
        """Every ``.toml`` in the demo folder and the working folder (top level and ``benches/``), labelled."""
        out: list[FileChoice] = []
        seen: set[Path] = set()
        for label, folder in (("demo", self.demo_folder), ("working folder", self.folder),
                              ("working folder", self.folder / "benches")):
            if not folder.is_dir():
                continue
            for p in sorted(folder.glob("*.toml")):
                if p.resolve() not in seen:
                    seen.add(p.resolve())
                    out.append(FileChoice(f"{p.name} ({label})", p))
        return out

    def files_of_kind(self, kind: str) -> list[FileChoice]:
        """The ``.toml`` files whose first table says they are a ``bench``, ``cart`` or ``template``."""
        from labkit.files.loader import file_kind, parse_toml, read_text

        out = []
        for choice in self.toml_files():
            try:
                data, _ = parse_toml(read_text(choice.path))
                found = file_kind(data)
            except (LabkitError, OSError, ValueError):
                continue
            if found == kind:
                out.append(choice)
        return out

    def load(self, bench: Path, cart: Path | None, template: Path) -> tuple[LoadedBench, LoadedTemplate]:
        """Load a bench (with its cart) and a template checked against it."""
        from labkit.files.loader import load_bench, load_template

        loaded = load_bench(bench, cart)
        return loaded, load_template(template, loaded.bench)

    # -- captures ------------------------------------------------------------------------------------
    def capture_files(self) -> list[FileChoice]:
        """Capture files in ``captures/`` (newest first)."""
        files = [p for p in self.captures.iterdir() if p.is_file() and p.suffix.lower() in CAPTURE_SUFFIXES
                 and not p.name.startswith(".")]
        files.sort(key=lambda p: p.stat().st_mtime, reverse=True)
        return [FileChoice(p.name, p) for p in files]

    def save_upload(self, name: str, data: bytes) -> Path:
        """Keep an uploaded capture in ``captures/`` under a safe, unused name; return its path."""
        base = Path(name).name or "upload"
        stem, suffix = os.path.splitext(base)
        if suffix.lower() not in CAPTURE_SUFFIXES:
            msg = f'"{base}": expected a capture file ending in {", ".join(CAPTURE_SUFFIXES)}'
            raise WorkspaceError(msg)
        safe_stem = "".join(c if c.isalnum() or c in "-_." else "_" for c in stem)[:80] or "upload"
        target = self.captures / f"{safe_stem}{suffix.lower()}"
        k = 1
        while target.exists():
            target = self.captures / f"{safe_stem}-{k}{suffix.lower()}"
            k += 1
        target.write_bytes(data)
        return target

    # -- archives ------------------------------------------------------------------------------------
    @property
    def archive(self) -> SQLiteArchive:
        """The local archive (opened on first use, kept open)."""
        if self._archive is None:
            from labkit.logbook.sqlite import SQLiteArchive

            self._archive = SQLiteArchive(self.archive_path)
        return self._archive

    def archive_files(self) -> list[FileChoice]:
        """Archives and hand-in files in the working folder (the local archive first)."""
        out = [FileChoice(f"{ARCHIVE_NAME} (local archive)", self.archive_path)]
        for folder in (self.folder, self.folder / "archive", self.folder / "hand-ins"):
            if not folder.is_dir():
                continue
            for p in sorted(folder.iterdir()):
                if p.is_file() and p.suffix.lower() in ARCHIVE_SUFFIXES and p.resolve() != self.archive_path:
                    out.append(FileChoice(f"{p.relative_to(self.folder)} (hand-in or archive)", p))
        return out

    # -- the last session ----------------------------------------------------------------------------
    def remember_session(self, session_id: str, actor_id: str, actor_role: str) -> None:
        """Note the running session so a restarted kernel resumes it."""
        path = self.folder / ".labkit" / LAST_SESSION
        tmp = path.with_suffix(".tmp")
        tmp.write_text(json.dumps({"session_id": session_id, "actor_id": actor_id, "actor_role": actor_role}),
                       encoding="utf-8")
        tmp.replace(path)  # atomic: a crash leaves the old note or the new one, never half of one

    def last_session(self) -> dict[str, str] | None:
        """The remembered session (id and actor), or None."""
        path = self.folder / ".labkit" / LAST_SESSION
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None
        if not isinstance(data, dict) or not data.get("session_id"):
            return None
        return {k: str(data.get(k, "")) for k in ("session_id", "actor_id", "actor_role")}

    def forget_session(self) -> None:
        """Drop the note of the running session (it was closed)."""
        (self.folder / ".labkit" / LAST_SESSION).unlink(missing_ok=True)

    def close(self) -> None:
        """Close the archive."""
        if self._archive is not None:
            self._archive.close()
            self._archive = None
