"""The JupyterLab front end (ipywidgets 8 + bqplot): the only package that imports widget libraries.

:class:`~labkit.widgets.app.LabApp` holds the planner, the bench-session view and the review on one
working folder; each view is thin widget state over the session, core and report layers.
"""

from __future__ import annotations

from typing import Any

__all__ = ["LabApp"]


def __getattr__(name: str) -> Any:
    if name == "LabApp":
        from labkit.widgets.app import LabApp

        return LabApp
    msg = f"module {__name__!r} has no attribute {name!r}"
    raise AttributeError(msg)
