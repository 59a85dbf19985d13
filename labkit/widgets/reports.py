"""Reports in the front end: rendered by :mod:`labkit.report`, written to ``reports/``, shown in a sandboxed frame.

A report is a complete page with its own style sheet; it is shown in an ``<iframe sandbox srcdoc=...>``
(escaped as an attribute), so its styles stay inside the frame and nothing in it can run.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

from labkit.core.errors import LabkitError
from labkit.widgets.text import Safe, esc, message

if TYPE_CHECKING:
    from labkit.widgets.workspace import Workspace


def safe_file_stem(text: str) -> str:
    """A file name stem from ids (letters, digits, dash, underscore, dot)."""
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", text).strip("._")[:80] or "report"


def framed(page_html: str, height_px: int = 640) -> Safe:
    """A full HTML page inside a sandboxed frame (no scripts, no same-origin access)."""
    return Safe(f'<iframe class="lk-report-frame" sandbox="" style="width:100%;height:{int(height_px)}px;'
                f'border:1px solid #8a94a3" srcdoc="{esc(page_html)}"></iframe>')


def show_report(archive: Any, session_id: str, workspace: Workspace,
                progress: Callable[[int, int, str], None]) -> Safe:
    """Render one session's report, write it to ``reports/`` and return the HTML that shows it."""
    from labkit.report.session import report_from_archive

    try:
        report = report_from_archive(archive, session_id, progress=progress)
    except (LabkitError, KeyError, ValueError) as exc:
        return message(f"no report for session {session_id}: {exc}", "problem")
    path = workspace.reports / f"{safe_file_stem(session_id)}-report.html"
    report.write(path)
    return Safe(message(f"report written to {path}", "ok") + framed(report.html))
