"""Review: open an archive or a hand-in file, filter its sessions, see readings, verdicts and diagnoses, open
any session's report, or resume a session in the bench-session view."""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import ipywidgets as w

from labkit.core.errors import LabkitError
from labkit.widgets.text import Safe, esc, message, num, set_choices, table, verdict_badge

if TYPE_CHECKING:
    import pandas as pd

    from labkit.widgets.workspace import Workspace

ALL = "(all)"
FILTERS = ("section", "group", "template_id", "cart")


class ReviewView:
    """Review widgets.

    Parameters
    ----------
    workspace
        The working folder.
    on_resume
        Called with a session id to continue it in the bench-session view (local archive only).
    progress
        ``progress(done, total, what)`` while a report renders.
    """

    def __init__(self, workspace: Workspace, on_resume: Callable[[str], None] | None = None,
                 progress: Callable[[int, int, str], None] | None = None) -> None:
        self.workspace = workspace
        self.on_resume = on_resume
        self.progress = progress or (lambda _d, _t, _w: None)
        self.archive: Any = None
        self.sessions: pd.DataFrame | None = None
        self.source = w.Dropdown(description="Archive", layout=w.Layout(width="520px"))
        self.open_button = w.Button(description="Open archive", layout=w.Layout(width="auto"))
        self.open_button.add_class("lk-open-archive")
        self.open_button.on_click(lambda _b: self.open())
        self.refresh_button = w.Button(description="Refresh list", layout=w.Layout(width="auto"))
        self.refresh_button.on_click(lambda _b: self.refresh_sources())
        self.filters = {name: w.Dropdown(description=label, options=[ALL], value=ALL, layout=w.Layout(width="260px"))
                        for name, label in zip(FILTERS, ("Section", "Group", "Template", "Cart"), strict=True)}
        for f in self.filters.values():
            f.observe(lambda _c: self.apply_filters(), names="value")
        self.date_from = w.DatePicker(description="From")
        self.date_to = w.DatePicker(description="To")
        for d in (self.date_from, self.date_to):
            d.observe(lambda _c: self.apply_filters(), names="value")
        self.session = w.Dropdown(description="Session", layout=w.Layout(width="640px"))
        self.session.observe(lambda _c: self.show_session(), names="value")
        self.report_button = w.Button(description="Open report", layout=w.Layout(width="auto"))
        self.report_button.add_class("lk-open-report")
        self.report_button.on_click(lambda _b: self.open_report())
        self.resume_button = w.Button(description="Continue this session", layout=w.Layout(width="auto"))
        self.resume_button.on_click(lambda _b: self._resume())
        self.status = w.HTML()
        self.list_out = w.HTML()
        self.readings_out = w.HTML()
        self.report_out = w.HTML()
        self.widget = w.VBox([
            w.HBox([self.source, self.open_button, self.refresh_button]), self.status,
            w.HBox([self.filters["section"], self.filters["group"]]),
            w.HBox([self.filters["template_id"], self.filters["cart"]]), w.HBox([self.date_from, self.date_to]),
            self.list_out, self.session, w.HBox([self.report_button, self.resume_button]), self.readings_out,
            self.report_out,
        ])
        self.widget.add_class("lk-review")
        self.refresh_sources()

    def refresh_sources(self) -> None:
        """List the archives and hand-in files of the working folder."""
        set_choices(self.source, [(f.label, str(f.path)) for f in self.workspace.archive_files()])

    def open(self, path: str | Path | None = None) -> bool:
        """Open the chosen archive (the local one as is; others read-only)."""
        from labkit.logbook.sqlite import SQLiteArchive

        target = Path(path or self.source.value)
        try:
            if target.resolve() == self.workspace.archive_path.resolve():
                self.archive = self.workspace.archive
            else:
                self.archive = SQLiteArchive(target, read_only=True)
            self.sessions = self.archive.sessions()
        except (LabkitError, OSError) as exc:
            self.status.value = message(f"cannot open {target}: {exc}", "problem")
            return False
        frame = self.sessions
        for name, f in self.filters.items():
            values = sorted({str(v) for v in frame[name].dropna()}) if not frame.empty else []
            set_choices(f, [ALL, *values], keep=False)
        self.status.value = message(f"{target.name}: {len(frame)} sessions", "ok")
        self.resume_button.disabled = self.archive is not self.workspace.archive
        self.apply_filters()
        return True

    def filtered(self) -> pd.DataFrame:
        """The sessions that pass the filters."""
        import pandas as pd

        frame = self.sessions
        if frame is None or frame.empty:
            return frame if frame is not None else pd.DataFrame()
        mask = pd.Series(True, index=frame.index)
        for name, f in self.filters.items():
            if f.value != ALL:
                mask &= frame[name].astype(str) == f.value
        created = pd.to_datetime(frame["created_at"], utc=True)
        if self.date_from.value is not None:
            mask &= created >= pd.Timestamp(dt.datetime.combine(self.date_from.value, dt.time()), tz="UTC")
        if self.date_to.value is not None:
            mask &= created < pd.Timestamp(dt.datetime.combine(self.date_to.value, dt.time()), tz="UTC") \
                + pd.Timedelta(days=1)
        return frame[mask]

    def apply_filters(self) -> None:
        """Refresh the session list after a filter change."""
        frame = self.filtered()
        if frame is None or frame.empty:
            self.list_out.value = esc("no sessions match")
            set_choices(self.session, [])
            return
        rows = [[str(r["created_at"])[:16], r["section"], r["group"], r["cart"], r["template_id"], r["state"],
                 r["kind"], r["session_id"]] for r in frame.to_dict("records")]
        self.list_out.value = table(["created (UTC)", "section", "group", "cart", "template", "state", "kind", "id"],
                                    rows)
        set_choices(self.session, [(f"{r[1]} / {r[2]} / {r[4]} ({r[0]})", r[7]) for r in rows])

    def show_session(self) -> None:
        """Show the chosen session's latest readings with verdicts and diagnoses."""
        if self.archive is None or not self.session.value:
            self.readings_out.value = ""
            return
        frame = self.archive.readings(self.session.value, latest_only=True)
        if frame.empty:
            self.readings_out.value = esc("no readings recorded in this session")
            return
        rows = []
        for r in frame.sort_values("seq").to_dict("records"):
            rows.append([r["step_id"], f"{r['quantity']} at {r['location']}", num(r["predicted"]),
                         f"{num(r['band_low'])} \u2026 {num(r['band_high'])}", num(r["measured"]), r["unit"],
                         r["entered"], verdict_badge(str(r["verdict"])), r.get("diagnosis") or "",
                         r["recorded_by"], int(r["revision"])])
        self.readings_out.value = Safe(table(["step", "reading", "predicted", "band", "measured", "unit",
                                              "entered", "verdict", "diagnosis", "by", "rev."], rows))

    def open_report(self) -> None:
        """Render and show the chosen session's report."""
        from labkit.widgets.reports import show_report

        if self.archive is None or not self.session.value:
            self.report_out.value = message("open an archive and choose a session", "problem")
            return
        self.report_out.value = show_report(self.archive, self.session.value, self.workspace, self.progress)

    def _resume(self) -> None:
        if self.on_resume is not None and self.session.value:
            self.on_resume(self.session.value)
