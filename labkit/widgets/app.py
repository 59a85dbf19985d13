"""The lab app: Plan, Bench session and Review in one widget, on one working folder.

On start it resumes the session the working folder remembers (a kernel restart mid-session brings the
runner back at its step with every recorded reading, read from the archive).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import ipywidgets as w

from labkit.core.errors import LabkitError
from labkit.widgets.overview import OverviewView
from labkit.widgets.planner import PlannerView
from labkit.widgets.review import ReviewView
from labkit.widgets.runner_view import RunnerView
from labkit.widgets.style import style_html
from labkit.widgets.text import esc, message
from labkit.widgets.workspace import Workspace

TAB_TITLES = ("Plan", "Bench session", "Review", "Section overview")


class LabApp:
    """The whole front end. Display it as the last expression of a cell (or with ``display(app.widget)``).

    Parameters
    ----------
    workspace
        The working folder.
    """

    def __init__(self, workspace: Workspace) -> None:
        self.workspace = workspace
        self.progress_bar = w.IntProgress(value=0, min=0, max=1, layout=w.Layout(width="300px", visibility="hidden"))
        self.progress_label = w.HTML()
        self.runner_view = RunnerView(workspace, self.progress)
        self.planner = PlannerView(workspace, self._started, self.progress)
        self.review = ReviewView(workspace, self.resume, self.progress)
        self.overview = OverviewView(workspace)
        self.tabs = w.Tab(children=[self.planner.widget, self.runner_view.widget, self.review.widget,
                                    self.overview.widget])
        for k, title in enumerate(TAB_TITLES):
            self.tabs.set_title(k, title)
        self.tabs.add_class("lk-tabs")
        self.banner = w.HTML()
        try:  # open (or create) the local archive now, so a folder that cannot hold it is reported at once
            workspace.archive  # noqa: B018
            where = f"archive {workspace.archive_path}"
        except LabkitError as exc:
            where = "NO ARCHIVE"
            self.banner.value = message(f"the local archive cannot be opened: {exc}", "problem")
        header = w.HTML(f'<div class="lk-big">labkit lab session</div><div class="lk-muted">working folder '
                        f"{esc(workspace.folder)}; {esc(where)}</div>")
        self.widget = w.VBox([w.HTML(style_html()), header, self.banner,
                              w.HBox([self.progress_bar, self.progress_label]), self.tabs])
        self.widget.add_class("lk-app")
        self._resume_last()

    @classmethod
    def for_folder(cls, folder: str | Path = ".", demo_folder: str | Path | None = None) -> LabApp:
        """The app on a working folder (the starter notebook's folder by default)."""
        return cls(Workspace(folder, demo_folder))

    def _ipython_display_(self) -> None:
        from IPython.display import display

        display(self.widget)

    def _repr_mimebundle_(self, **kwargs: Any) -> Any:
        return self.widget._repr_mimebundle_(**kwargs)

    # -- progress ------------------------------------------------------------------------------------
    def progress(self, done: int, total: int, what: str) -> None:
        """Show progress of a long computation (hidden again when done)."""
        self.progress_bar.max = max(int(total), 1)
        self.progress_bar.value = min(int(done), self.progress_bar.max)
        finished = done >= total
        self.progress_bar.layout.visibility = "hidden" if finished else "visible"
        self.progress_label.value = "" if finished else esc(f"{what} ({done}/{total})")

    # -- sessions ------------------------------------------------------------------------------------
    def _started(self, runner: Any) -> None:
        self.workspace.remember_session(runner.session_id, runner.actor.id, runner.actor.role)
        self.runner_view.attach(runner, f"session {runner.session_id} is open: enter readings step by step")
        self.tabs.selected_index = 1
        self.review.refresh_sources()

    def resume(self, session_id: str, actor_id: str = "", actor_role: str = "") -> bool:
        """Continue a session of the local archive in the bench-session view."""
        from labkit.session.runner import Actor, SessionRunner

        archive = self.workspace.archive
        try:
            sessions = archive.sessions()
            match = sessions[sessions["session_id"] == session_id]
            if match.empty:
                msg = f'no session "{session_id}" in the local archive'
                raise LabkitError(msg)
            import json

            people = json.loads(str(match.iloc[0]["people"]))
            who = Actor(actor_id or (people[0] if people else str(match.iloc[0]["created_by"])),
                        actor_role or ("student" if people else "ta"))
            runner = SessionRunner.resume(archive, session_id, who)
        except (LabkitError, ValueError, KeyError) as exc:
            self.banner.value = message(f"cannot resume session {session_id}: {exc}", "problem")
            return False
        n = sum(1 for e in runner.entries if e.status == "recorded")
        note = (f"resumed session {session_id} from the archive: step {runner.current + 1}, {n} recorded "
                f"reading{'s' if n != 1 else ''} shown")
        self.runner_view.attach(runner, note)
        self.workspace.remember_session(session_id, who.id, who.role)
        self.tabs.selected_index = 1
        self.banner.value = ""  # the bench-session view says it; one message, not two
        return True

    def _resume_last(self) -> None:
        last = self.workspace.last_session()
        if last is None:
            return
        self.resume(last["session_id"], last["actor_id"], last["actor_role"])
