"""The working folder ``labkit lab`` opens: the starter notebook, a demo roster, folders for captures and reports.

The starter notebook is built here (its cells are package code, so every install carries it) and
written into the working folder, never into site-packages. A copy the user has edited is never
overwritten: when the shipped starter differs from the file on disk and the file is not one labkit
wrote (its recorded hash differs), the new version goes beside it as ``starter-new.ipynb``.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from pathlib import Path

STARTER_NAME = "starter.ipynb"
STARTER_NEW_NAME = "starter-new.ipynb"
DEFAULT_FOLDER = "labkit-work"
DEMO_ROSTER_NAME = "demo-roster.csv"
SUBFOLDERS = ("captures", "reports", "archive")
STATE_FOLDER = ".labkit"
_WRITTEN_HASH = "starter.sha256"

# The demo roster: invented pseudonymous ids and invented names (DEMO DATA, labelled as such).
DEMO_ROSTER = """participant_id,name,section,group,role
ta-demo,Demo Teaching Assistant,S01,,ta
p-101,Demo Student One,S01,G1,student
p-102,Demo Student Two,S01,G1,student
p-103,Demo Student Three,S01,G2,student
p-104,Demo Student Four,S01,G2,student
p-201,Demo Student Five,S02,G1,student
"""

INTRO = """# labkit: lab session

**Demo data.** The bench, cart, template and roster in this folder are invented for the demo; they describe no
real lab.

Run the cell below (Shift+Enter). Three tabs appear:

* **Plan**: bench, template, roster, section, group and people; every step's predicted readings with bands
  and cautions; the pre-lab sheet.
* **Bench session**: one step at a time. Type each reading with its unit and press Enter; the verdict
  appears beside it. Captures: upload, pick a file from `captures/`, or take one from the simulated bench.
* **Review**: sessions of an archive or hand-in file, filtered; readings, verdicts, diagnoses, reports.

Everything you enter is committed to the archive in `archive/` before it is shown as recorded. After a
kernel restart, run the cell again: the session comes back with every recorded reading.

The cautions shown never replace the lab's safety rules, local electrical codes or your supervisor.
"""

APP_CELL = """from labkit.widgets import LabApp

app = LabApp.for_folder(".")
app"""


def starter_notebook() -> dict:
    """The starter notebook as nbformat 4 JSON (a dict)."""
    def cell(kind: str, source: str, cell_id: str) -> dict:
        c: dict = {"cell_type": kind, "id": cell_id, "metadata": {}, "source": source}
        if kind == "code":
            c |= {"execution_count": None, "outputs": []}
        return c

    return {
        "cells": [cell("markdown", INTRO, "labkit-intro"), cell("code", APP_CELL, "labkit-app")],
        "metadata": {
            # a kernelspec stops JupyterLab from asking which kernel to use
            "kernelspec": {"name": "python3", "display_name": "Python 3 (ipykernel)", "language": "python"},
            "language_info": {"name": "python"},
        },
        "nbformat": 4,
        "nbformat_minor": 5,
    }


def starter_text() -> str:
    """The starter notebook file's text."""
    return json.dumps(starter_notebook(), indent=1, ensure_ascii=False) + "\n"


@dataclass
class PreparedFolder:
    """What :func:`prepare_folder` did."""

    folder: Path
    notebook: Path
    written: list[Path] = field(default_factory=list)
    kept: list[Path] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)


def _sha(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def prepare_folder(folder: str | Path = DEFAULT_FOLDER) -> PreparedFolder:
    """Create (or refresh) a working folder and return where its starter notebook is.

    Parameters
    ----------
    folder
        The working folder; created with its parents when missing.

    Returns
    -------
    PreparedFolder
        The notebook to open (the user's own copy when it was edited), and what was written or kept.
    """
    root = Path(folder).expanduser().resolve()
    if root.exists() and not root.is_dir():
        msg = f"{root}: the working folder is a file; give a folder with --folder"
        raise NotADirectoryError(msg)
    root.mkdir(parents=True, exist_ok=True)
    for sub in (*SUBFOLDERS, STATE_FOLDER):
        (root / sub).mkdir(exist_ok=True)
    out = PreparedFolder(root, root / STARTER_NAME)
    text = starter_text()
    nb = root / STARTER_NAME
    marker = root / STATE_FOLDER / _WRITTEN_HASH
    if not nb.exists():
        nb.write_text(text, encoding="utf-8")
        marker.write_text(_sha(text), encoding="utf-8")
        out.written.append(nb)
    else:
        on_disk = _sha(nb.read_text(encoding="utf-8", errors="replace"))
        ours = marker.read_text(encoding="utf-8").strip() if marker.is_file() else ""
        if on_disk == _sha(text):
            out.kept.append(nb)
        elif on_disk == ours:  # labkit wrote it and nobody edited it since: safe to refresh
            nb.write_text(text, encoding="utf-8")
            marker.write_text(_sha(text), encoding="utf-8")
            out.written.append(nb)
        else:  # the user's own edits: keep them, put the new version beside them
            new = root / STARTER_NEW_NAME
            new.write_text(text, encoding="utf-8")
            out.kept.append(nb)
            out.written.append(new)
            out.notes.append(f"{nb.name} has your edits and was kept; the shipped version is in {new.name}")
    roster = root / DEMO_ROSTER_NAME
    if not roster.exists():
        roster.write_text(DEMO_ROSTER, encoding="utf-8")
        out.written.append(roster)
    return out
