"""Kernel-side tests of the widget front end: set values and call handlers as the browser would, assert what the
model, the archive and the shown HTML become. No browser needed (tests/browser/ has the end-to-end test)."""

from __future__ import annotations

import html
import math
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("ipywidgets")
pytest.importorskip("bqplot")

from labkit.lab.workfolder import prepare_folder
from labkit.logbook.storage import NotRecordedError
from labkit.widgets.app import LabApp

DEMO = Path(__file__).resolve().parent.parent / "session_templates"
PAYLOAD = '<img src=x onerror="window.__pwned=1">'


def _app(tmp_path: Path, template: str = "lab1") -> LabApp:
    folder = prepare_folder(tmp_path / "work").folder
    app = LabApp.for_folder(folder, DEMO)
    pl = app.planner
    pl.template.value = next(v for label, v in pl.template.options if label.startswith(template))
    assert pl.load(), pl.loaded_note.value
    assert pl.import_roster(), pl.roster_note.value
    return app


def _started(tmp_path: Path, template: str = "lab1") -> LabApp:
    app = _app(tmp_path, template)
    assert app.planner.start() is not None, app.planner.status.value
    return app


def _front_end_sets(widget, **state) -> None:
    """Deliver a state update as the front end sends it (a comm 'update' message)."""
    widget._handle_msg({"content": {"data": {"method": "update", "state": state, "buffer_paths": []}}, "buffers": []})


def _front_end_uploads(upload, name: str, data: bytes) -> None:
    """Deliver a file as the ipywidgets 8 front end does: metadata in the state, the bytes as a binary buffer."""
    state = {"value": [{"name": name, "type": "text/csv", "size": len(data), "last_modified": 1_700_000_000_000}]}
    upload._handle_msg({"content": {"data": {"method": "update", "state": state,
                                             "buffer_paths": [["value", 0, "content"]]}},
                        "buffers": [memoryview(data)]})


def test_planner_fills_people_from_roster_and_previews_every_step(tmp_path):
    app = _app(tmp_path)
    pl = app.planner
    # demo-roster.csv (written by prepare_folder): S01/G1 holds p-101 and p-102, staff ta-demo
    assert pl.section.value == "S01"
    assert pl.group.value == "G1"
    assert pl.people.value == "p-101, p-102"
    assert pl.staff.value == "ta-demo"
    pl.preview()
    out = pl.preview_out.value
    steps = pl.loaded[1].template.steps
    assert all(f"Step {i + 1}:" in out for i in range(len(steps)))
    # cautions a mains-derived source implies are always shown (labkit.core.cautions, common practice)
    assert "does not isolate from the mains" in out
    assert "lk-caution" in out


def test_reading_commits_on_enter_and_shows_verdict_word_and_symbol(tmp_path):
    app = _started(tmp_path)
    rv = app.runner_view
    assert app.tabs.selected_index == 1
    row = rv.rows[0]  # v_rms at B1, predicted about 120 V
    assert row.entry.continuous_update is False  # commit on Enter or blur, never per keystroke
    _front_end_sets(row.entry, value="120.0 V")
    assert "ACCEPT" in row.verdict.value
    assert "\u2713" in row.verdict.value
    assert "120 V" in row.echo.value
    assert "recorded #" in row.echo.value
    assert row.entry.value == ""  # cleared once recorded; the typed text is in the archive row
    stored = app.workspace.archive.readings(rv.runner.session_id, latest_only=True)
    assert list(stored["entered"]) == ["120.0 V"]
    assert list(stored["verdict"]) == ["accept"]
    _front_end_sets(rv.rows[1].entry, value="50 Hz")  # frequency at B1, predicted 60 Hz
    assert "OUTSIDE" in rv.rows[1].verdict.value
    assert "\u2717" in rv.rows[1].verdict.value


def test_unreadable_value_is_kept_and_not_recorded(tmp_path):
    app = _started(tmp_path)
    row = app.runner_view.rows[0]
    row.entry.value = "120 Hz"  # wrong kind of unit for a voltage
    assert "Not understood" in row.echo.value
    assert row.entry.value == "120 Hz"
    assert app.workspace.archive.readings(app.runner_view.runner.session_id).empty


def test_correction_needs_a_reason_and_appends_a_revision(tmp_path):
    app = _started(tmp_path)
    rv = app.runner_view
    row = rv.rows[0]
    row.entry.value = "12 V"
    row.entry.value = "119.5 V"
    assert "this is a correction" in row.verdict.value
    assert row.entry.value == "119.5 V"  # kept until the reason comes
    rv.reason.value = "misread the range switch"
    assert "ACCEPT" in row.verdict.value
    assert "correction 1" in row.echo.value
    all_rows = app.workspace.archive.readings(rv.runner.session_id)
    assert sorted(all_rows["revision"]) == [0, 1]
    assert set(all_rows["reason"].fillna("")) == {"", "misread the range switch"}


def test_a_correction_reason_is_cleared_before_the_verdict_shows(tmp_path):
    # a reason typed for the next correction while the last one is still recording must not be wiped
    app = _started(tmp_path)
    rv = app.runner_view
    row = rv.rows[0]
    row.entry.value = "12 V"
    rv.reason.value = "misread the range switch"
    order = []
    rv.reason.observe(lambda c: order.append(("reason", c["new"])), names="value")
    row.verdict.observe(lambda c: order.append(("verdict", "")), names="value")
    row.entry.value = "119.5 V"
    assert order[0] == ("reason", "")
    assert rv.reason.value == ""
    assert "correction 1" in row.echo.value


def test_skip_needs_a_reason_and_moves_on(tmp_path):
    app = _started(tmp_path)
    rv = app.runner_view
    rv._move("skip")
    assert "reason" in rv.notice.value
    assert rv.runner.current == 0
    rv.skip_reason.value = "meter missing"
    rv._move("skip")
    assert rv.runner.current == 1
    assert "skipped" in rv.steps.value
    rv._move("back")
    assert "Skipped:" in rv.step_head.value
    assert "meter missing" in rv.step_head.value


def test_not_recorded_reading_stays_visible_and_retry_records_it(tmp_path, monkeypatch):
    app = _started(tmp_path)
    rv = app.runner_view
    archive = app.workspace.archive
    real = archive.append_reading

    def failing(row):
        msg = "the disk (or the archive's size limit) is full"
        raise NotRecordedError(msg)

    monkeypatch.setattr(archive, "append_reading", failing)
    row = rv.rows[0]
    row.entry.value = "120.1 V"
    assert "NOT RECORDED" in row.verdict.value
    assert row.retry.layout.display == ""
    monkeypatch.setattr(archive, "append_reading", real)
    row.retry.click()
    assert "ACCEPT" in row.verdict.value
    assert row.retry.layout.display == "none"
    assert len(archive.readings(rv.runner.session_id)) == 1


def test_kernel_restart_resumes_session_with_every_reading(tmp_path):
    app = _started(tmp_path)
    rv = app.runner_view
    rv.rows[0].entry.value = "120.2 V"
    rv.rows[1].entry.value = "59.2 Hz"
    rv._move("forward")
    folder = app.workspace.folder
    app.workspace.close()
    again = LabApp.for_folder(folder, DEMO)  # what re-running the starter cell after a restart does
    assert "resumed session" in again.runner_view.notice.value
    assert again.tabs.selected_index == 1
    assert again.runner_view.runner.current == 1
    again.runner_view._move("back")
    verdicts = [r.verdict.value for r in again.runner_view.rows]
    assert "ACCEPT" in verdicts[0]
    assert "OUTSIDE" in verdicts[1]


def test_user_text_is_escaped_everywhere_it_is_shown(tmp_path):
    app = _app(tmp_path)
    pl = app.planner
    pl.people.value = f"p-101, {PAYLOAD}"
    pl.section.value = PAYLOAD
    pl.group.value = PAYLOAD
    assert pl.start() is not None
    rv = app.runner_view
    shown = rv.strip.value + rv.actor.options[1][0]
    assert "<img" not in rv.strip.value
    assert html.escape(PAYLOAD) in rv.strip.value
    assert PAYLOAD in shown  # the dropdown label is text, not HTML
    rv.rows[0].entry.value = PAYLOAD + " V"
    assert "<img" not in rv.rows[0].echo.value
    app.review.open()
    assert "<img" not in app.review.list_out.value


def test_capture_upload_limit_is_shown_and_enforced(tmp_path):
    from labkit.widgets.capture import CapturePanel
    from labkit.widgets.workspace import Workspace

    ws = Workspace(prepare_folder(tmp_path / "w").folder, DEMO)
    panel = CapturePanel(ws, lambda _p: None, limit_bytes=1000)
    assert "1000 bytes" in panel.limit_note.value
    _front_end_uploads(panel.upload, "big.csv", b"x" * 5000)
    assert "above the upload limit" in panel.status.value
    assert "Problem" in panel.status.value
    assert ws.capture_files() == []


def test_simulated_capture_then_uploaded_file_give_readings(tmp_path):
    from labkit.captures.csvio import format_csv

    app = _started(tmp_path)
    rv = app.runner_view
    cap_panel = rv.capture
    cap_panel.target.value = 0
    cap_panel.take()
    assert "capture ready" in cap_panel.status.value
    assert cap_panel.use() is not None
    assert "ACCEPT" in rv.rows[0].verdict.value
    assert "simulated" in rv.rows[0].echo.value
    # the same capture uploaded as a CSV file: kept in captures/, listed, analysed
    text = format_csv(cap_panel.capture).encode()
    _front_end_uploads(cap_panel.upload, "bench run.csv", text)
    assert "capture ready" in cap_panel.status.value, cap_panel.status.value
    assert [f.label for f in app.workspace.capture_files()] == ["bench_run.csv"]


def test_waveform_decimation_keeps_the_peaks_of_a_long_capture():
    from labkit.widgets.plots import COLUMNS, WaveformPlot

    # 1,000,000 samples of a 120 V RMS sine: its peak is sqrt(2) x RMS (textbook definition of RMS of a sine)
    n, rate, f = 1_000_000, 100_000.0, 60.0
    t = np.arange(n) / rate
    v = math.sqrt(2) * 120.0 * np.sin(2 * np.pi * f * t)
    plot = WaveformPlot()
    plot.show(t, v[None, :], ["v@B1"], ["V"])
    assert plot.points_per_trace == 2 * COLUMNS
    y = np.atleast_2d(plot.lines.y)[0]
    assert y.max() == pytest.approx(math.sqrt(2) * 120.0, rel=1e-4)
    assert y.min() == pytest.approx(-math.sqrt(2) * 120.0, rel=1e-4)
    plot.sx.min, plot.sx.max = 0.0, 0.01  # zoom to 10 ms: re-decimated over the visible samples only
    x = np.atleast_2d(plot.lines.x)[0]
    assert x.min() >= 0.0 - 1 / rate
    assert x.max() <= 0.01 + 2 / rate


def test_phasor_plot_draws_a_lagging_current_below_the_reference():
    from labkit.widgets.plots import PhasorPlot

    # passive sign convention, IEEE 1459 / labkit conventions: an inductive load's current lags its voltage,
    # so its phasor is drawn clockwise from the voltage (negative angle)
    p = PhasorPlot()
    v = 120.0 * np.exp(1j * np.radians(10.0))
    i = 2.0 * np.exp(1j * np.radians(10.0 - 30.0))
    p.show(["v", "i"], ["voltage", "current"], [v, i])
    angles = {name: angle for name, _mag, angle in p.tips}
    assert angles["v"] == pytest.approx(0.0, abs=1e-9)
    assert angles["i"] == pytest.approx(-30.0, abs=1e-9)
    assert np.atleast_2d(p.currents.y)[0][1] < 0


def test_sync_view_updates_from_entered_values_and_ages(tmp_path):
    app = _started(tmp_path, "lab2")
    rv = app.runner_view
    clock = [1000.0]
    rv.sync.clock = lambda: clock[0]
    for _ in range(3):
        rv._move("forward")
    assert rv.runner.view().step.kind == "synchronize"
    assert rv.sync_box.children
    sync = rv.sync
    sync.fields["in_f"].value = "60.25 Hz"
    sync.fields["run_f"].value = "60 Hz"
    sync.apply_entered()
    # slip = f_in - f_run (incoming minus running); beat period 1/|slip| (common practice)
    assert sync.prediction.slip_hz == pytest.approx(0.25)
    assert sync.prediction.beat_period_s == pytest.approx(4.0)
    assert "0.25 Hz" in sync.figures.value
    assert "4 s" in sync.figures.value
    clock[0] += 7.5
    sync.refresh()
    assert "7.5 s old" in sync.figures.value
    assert np.asarray(sync.plot.phase.x).size == 600
    assert "supervisor decides" in sync.advice.value


def test_review_filters_sessions_and_opens_a_report(tmp_path):
    app = _started(tmp_path)
    app.runner_view.rows[0].entry.value = "120 V"
    rev = app.review
    assert rev.open()
    assert len(rev.session.options) == 1
    rev.filters["section"].value = "S01"
    assert len(rev.session.options) == 1
    rev.filters["group"].value = "G1"
    rev.show_session()
    assert "ACCEPT" in rev.readings_out.value
    rev.open_report()
    assert "report written to" in rev.report_out.value
    assert 'sandbox=""' in rev.report_out.value
    assert list(app.workspace.reports.glob("*-report.html"))


def test_buttons_carry_text(tmp_path):
    import ipywidgets as w

    app = _app(tmp_path)
    seen = []

    def walk(widget):
        if isinstance(widget, w.Button | w.FileUpload):
            seen.append(widget)
        for child in getattr(widget, "children", ()):
            walk(child)

    walk(app.widget)
    walk(app.runner_view.capture.widget)
    assert len(seen) > 10
    assert all(b.description.strip() for b in seen)
