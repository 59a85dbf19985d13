"""The TA's section overview view: fed by a background refresher, never blocking, everything escaped.

Outside reference: html.parser (Python's own HTML parser) reads the rendered table back.
"""

from __future__ import annotations

import time
from datetime import UTC, datetime
from html.parser import HTMLParser

import pytest

pytest.importorskip("ipywidgets")

from labkit.logbook.overview import GroupStatus, OutsideReading, SectionOverview
from labkit.widgets.overview import OverviewView, overview_html
from labkit.widgets.workspace import Workspace


def _view(note: str = "ok") -> SectionOverview:
    g = GroupStatus("S1", "<script>alert(1)</script>", "sid", "lab", "open", "cart-03", "lab1", 2, "load", "Load",
                    6, 5)
    g.outside.append(OutsideReading("r1", "load", "v_rms", "B2", 1143.0, 114.5, 114.2, 114.8, "V", note, "p1",
                                    datetime.now(UTC)))
    return SectionOverview("test", "S1", [g], datetime.now(UTC), 0.01)


class _Text(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.text: list[str] = []
        self.tags: list[str] = []

    def handle_starttag(self, tag: str, attrs: list) -> None:
        self.tags.append(tag)

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def test_overview_table_escapes_and_names_outside_readings() -> None:
    parser = _Text()
    parser.feed(overview_html(_view()))
    assert "script" not in parser.tags
    text = " ".join(parser.text)
    assert "<script>alert(1)</script>" in text  # shown as text, not run
    assert "OUTSIDE x1" in text
    assert "v_rms at B2" in text


def test_view_polls_a_background_build_without_blocking(tmp_path) -> None:
    calls = []

    def slow_build(source: str, section: str | None) -> SectionOverview:
        calls.append((source, section))
        time.sleep(0.3)
        return _view()

    view = OverviewView(Workspace(tmp_path), interval_s=2.0, build=slow_build)
    view.section.value = "S1"
    t0 = time.perf_counter()
    view.start()
    assert time.perf_counter() - t0 < 0.2  # start returns at once; the build runs in the background
    deadline = time.monotonic() + 10
    while "OUTSIDE" not in view.output.value and time.monotonic() < deadline:
        time.sleep(0.05)
    view.stop()
    assert "OUTSIDE x1" in view.output.value
    assert calls[0] == ("", "S1")
