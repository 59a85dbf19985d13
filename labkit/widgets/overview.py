"""The TA's section overview: every group's step, outstanding "outside" readings, ratings and sync attempts.

The data come from :mod:`labkit.logbook.overview`, rebuilt in a background thread
(:class:`~labkit.logbook.overview.OverviewRefresher`); this view only polls the latest result, so the
TA's own work in the other tabs never waits on the archive or the server.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import ipywidgets as w

from labkit.core.errors import LabkitError
from labkit.widgets.text import Safe, message, num, table

if TYPE_CHECKING:
    from labkit.logbook.overview import SectionOverview
    from labkit.widgets.workspace import Workspace

POLL_S = 1.0  # how often the view looks for a new overview (cheap: no I/O)


def overview_html(view: SectionOverview) -> Safe:
    """The overview as an escaped HTML table (verdicts by word, not colour)."""
    rows = []
    for g in view.groups:
        outside = "; ".join(f"{o.quantity} at {o.location} = {num(o.measured)} {o.unit} (step {o.step_id})"
                            for o in g.outside) or "none"
        sync = ", ".join(f"{a.quantity} {num(a.measured)} {a.unit} {a.verdict.upper()}" for a in g.sync_attempts)
        rows.append([f"{g.section} / {g.group}", g.cart, f"{g.state} ({g.kind})",
                     f"{g.step_index + 1} of {g.n_steps}: {g.step_title or g.step_id}", g.readings,
                     f"OUTSIDE x{len(g.outside)}: {outside}" if g.outside else "none",
                     "; ".join(g.rating_warnings) or "none", sync or "none",
                     g.last_activity.strftime("%H:%M:%S UTC") if g.last_activity else "",
                     "; ".join(g.problems)])
    head = table(["group", "cart", "state", "current step", "readings", "outstanding outside", "ratings",
                  "sync attempts", "last activity", "problems"], rows, cls="lk-table lk-overview")
    stamp = message(f"{len(view.groups)} group(s) from {view.source}; built {view.built_at:%H:%M:%S} UTC "
                    f"in {view.seconds:.2f} s", "info")
    return Safe(stamp + head)


class OverviewView:
    """Section overview widgets: pick the source (local archive, server URL, or hand-in files), a section, go."""

    def __init__(self, workspace: Workspace, interval_s: float = 10.0,
                 build: Callable[[str, str | None], SectionOverview] | None = None) -> None:
        self.workspace = workspace
        self.source = w.Text(value=os.environ.get("LABKIT_ARCHIVE", ""), placeholder=str(workspace.archive_path),
                             description="Archive", layout=w.Layout(width="520px"))
        self.section = w.Text(placeholder="all sections", description="Section", layout=w.Layout(width="260px"))
        self.interval = w.BoundedFloatText(value=interval_s, min=2.0, max=600.0, description="Every (s)",
                                           layout=w.Layout(width="180px"))
        self.start_button = w.Button(description="Start live overview", layout=w.Layout(width="auto"))
        self.start_button.add_class("lk-overview-start")
        self.stop_button = w.Button(description="Stop", layout=w.Layout(width="auto"), disabled=True)
        self.refresh_button = w.Button(description="Refresh now", layout=w.Layout(width="auto"), disabled=True)
        self.status = w.HTML()
        self.output = w.HTML()
        self.output.add_class("lk-overview-table")
        self.start_button.on_click(lambda _b: self.start())
        self.stop_button.on_click(lambda _b: self.stop())
        self.refresh_button.on_click(lambda _b: self.refresher and self.refresher.refresh_now())
        self._build = build or self._default_build
        self.refresher: Any = None
        self._poller: threading.Thread | None = None
        self._shown = -1
        self._stop = threading.Event()
        self.widget = w.VBox([w.HBox([self.source, self.section, self.interval]),
                              w.HBox([self.start_button, self.refresh_button, self.stop_button]),
                              self.status, self.output])

    def _default_build(self, source: str, section: str | None) -> SectionOverview:
        from labkit.logbook.open import open_archive
        from labkit.logbook.overview import overview_from_hand_ins, section_overview

        paths = [p.strip() for p in source.split(",") if p.strip()]
        if len(paths) > 1:  # collected hand-in files, offline
            return overview_from_hand_ins(paths, section)
        target = paths[0] if paths else str(self.workspace.archive_path)
        archive = open_archive(target if "://" in target else Path(target))
        try:
            return section_overview(archive, section, source=_redacted(target))
        finally:
            archive.close()

    def start(self) -> None:
        """Start rebuilding in the background and polling for results."""
        from labkit.logbook.overview import OverviewRefresher

        self.stop()
        source, section = self.source.value.strip(), self.section.value.strip() or None
        try:
            self.refresher = OverviewRefresher(lambda: self._build(source, section), float(self.interval.value))
        except (LabkitError, ValueError) as exc:
            self.status.value = message(str(exc), "problem")
            return
        self.refresher.start()
        self._stop.clear()
        self._poller = threading.Thread(target=self._poll, name="labkit-overview-view", daemon=True)
        self._poller.start()
        self.start_button.disabled, self.stop_button.disabled, self.refresh_button.disabled = True, False, False
        self.status.value = message("building the overview in the background...", "info")

    def _poll(self) -> None:
        while not self._stop.wait(POLL_S):
            self.show_latest()

    def show_latest(self) -> None:
        """Show the newest overview if there is one (no I/O; safe from any thread)."""
        if self.refresher is None:
            return
        version, view, error = self.refresher.latest()
        if version == self._shown:
            return
        self._shown = version
        if view is not None:
            self.output.value = overview_html(view)
        self.status.value = message(f"last refresh failed, showing the previous overview: {error}", "problem") \
            if error else message("live: refreshed in the background", "ok")

    def stop(self) -> None:
        """Stop refreshing."""
        self._stop.set()
        if self.refresher is not None:
            self.refresher.stop()
            self.refresher = None
        self.start_button.disabled, self.stop_button.disabled, self.refresh_button.disabled = False, True, True


def _redacted(target: str) -> str:
    try:
        from labkit.logbook.postgres import redact_url
    except ImportError:  # psycopg not installed: a local path needs no redaction
        return target
    return redact_url(target) if "://" in target else target
