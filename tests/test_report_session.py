"""The session report, the pre-lab sheet and table export, on invented sessions (DEMO DATA) in a SQLiteArchive.

Outside references: hashlib (SHA-256 of the stored texts), pandas' own drop_duplicates/value_counts
(independent recomputation of latest revisions and verdict counts), openpyxl and pyarrow reading back the
exported files, the PDF file signature ``%PDF-`` (ISO 32000-1, 7.5.2), and the closing-window length
``2 * dphi_limit / (360 * |slip|)`` of the field reference (section 1.4, [CALC]).
"""

from __future__ import annotations

import hashlib
import json
import os
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from labkit.captures.capture import Capture
from labkit.captures.csvio import format_csv
from labkit.core.cautions import DEFER, MAINS, SYNC
from labkit.logbook.sqlite import SQLiteArchive
from labkit.report.common import ReportError, latest_revisions
from labkit.report.html import CSP
from labkit.report.prelab import prelab_sheet
from labkit.report.session import report_from_archive, session_report
from labkit.report.tables import write_tables
from tests.test_report_data import T0, plan, readings_for, session_row


def _rows(frame: pd.DataFrame) -> list[dict]:
    return [{k: v for k, v in row.items() if k not in ("seq", "recorded_at")} for row in frame.to_dict("records")]


@pytest.fixture
def archive(tmp_path: Path) -> SQLiteArchive:
    arc = SQLiteArchive(tmp_path / "log.sqlite")
    a = session_row("sess-a", group="G1", people=["p-101", "p-102"])
    b = session_row("sess-b", group="G2", people=["p-201"], created_at=T0 + pd.Timedelta(hours=3))
    arc.create_session(a)
    arc.create_session(b)
    ra = readings_for(a, error=0.0, seed=1, note="note of group one", corrections=True)
    rb = readings_for(b, error=0.3, seed=2, note="SECRET-B-NOTE", recorded_by="p-201")
    # a captured waveform behind one of group one's readings
    t = np.arange(20_000) / 10_000.0
    cap = Capture(np.vstack([170 * np.sin(2 * np.pi * 60 * t), 2.0 * np.sin(2 * np.pi * 60 * t - 0.3)]), 10_000.0,
                  ("v_B1", "i_L12"), ("V", "A"))
    cid = arc.store_capture("sess-a", "scope-01.csv", format_csv(cap).encode())
    ra.loc[0, "capture_id"] = cid
    ra.loc[0, "obtained"] = "capture"
    arc.append_readings(_rows(ra))
    arc.append_readings(_rows(rb))
    arc.add_roster([{"participant_id": "p-101", "name": "Alex Example", "section": "S01", "group": "G1",
                     "role": "student"}])
    yield arc
    arc.close()


def test_a_groups_report_holds_only_its_own_rows(archive: SQLiteArchive) -> None:
    rep = report_from_archive(archive, "sess-a")
    assert "note of group one" in rep.html
    assert "SECRET-B-NOTE" not in rep.html
    assert "p-201" not in rep.html
    assert "sess-b" not in rep.html
    b_ids = set(archive.readings("sess-b")["reading_id"])
    assert not any(rid in rep.html for rid in b_ids)
    assert set(rep.tables["readings"]["session_id"]) == {"sess-a"}
    # even when handed every row of the log, and a stray row claiming the session for another group
    everything = archive.readings()
    stray = everything[everything["session_id"] == "sess-b"].head(1).assign(session_id="sess-a",
                                                                           note="STRAY-ROW")
    session = archive.sessions().set_index("session_id").loc["sess-a"].to_dict() | {"session_id": "sess-a"}
    rep2 = session_report(session, pd.concat([everything, stray]))
    assert "SECRET-B-NOTE" not in rep2.html
    assert "STRAY-ROW" not in rep2.html


def test_header_shows_ids_and_names_only_when_asked(archive: SQLiteArchive) -> None:
    plain = report_from_archive(archive, "sess-a")
    assert "p-101, p-102" in plain.html
    assert "Alex Example" not in plain.html
    named = report_from_archive(archive, "sess-a", with_names=True)
    assert "Alex Example (p-101)" in named.html
    for word in ("S01", "G1", "cart-03", "2026-10-05 13:00 UTC"):
        assert word in plain.html


def test_cautions_are_always_shown(archive: SQLiteArchive) -> None:
    html_text = report_from_archive(archive, "sess-a").html
    for caution in (DEFER, MAINS, SYNC, "Only the supervisor gives permission to close a synchronizing switch."):
        assert caution.replace("'", "&#x27;") in html_text


def test_steps_have_diagram_table_phasors_and_page_breaks(archive: SQLiteArchive) -> None:
    rep = report_from_archive(archive, "sess-a")
    _, template, *_ = plan()
    sections = rep.html.count('<section class="step">')
    assert sections == len(template.steps)
    assert rep.html.count('aria-label="configuration after step') == len(template.steps)
    assert rep.html.count('aria-label="phasors, step') == len(template.steps)
    assert "break-before: page" in rep.html
    assert f'content="{CSP}"'.replace("'", "&#x27;") in rep.html
    # no fetch of anything: no src attribute other than data:, no stylesheet links
    assert not re.search(r'\ssrc="(?!data:)', rep.html)
    assert "<link" not in rep.html


def test_summary_counts_match_an_independent_recount(archive: SQLiteArchive) -> None:
    rows = archive.readings("sess-a")
    # reference: newest revision per reading by pandas sorting, then value_counts
    want = rows.sort_values(["reading_id", "revision"]).drop_duplicates("reading_id", keep="last")
    want_counts = want["verdict"].value_counts().to_dict()
    rep = report_from_archive(archive, "sess-a")
    got = dict(zip(rep.tables["verdicts"]["verdict"], rep.tables["verdicts"]["count"], strict=True))
    assert got == want_counts
    assert len(latest_revisions(rows)) == len(want)
    embedded = re.search(r'<script type="application/json" id="labkit-data">(.*?)</script>', rep.html).group(1)
    assert json.loads(embedded)["verdicts"] == want_counts


def test_corrections_show_every_revision_with_reason(archive: SQLiteArchive) -> None:
    rep = report_from_archive(archive, "sess-a")
    assert rep.html.count("Corrections (every revision)") == len({s.id for s in plan()[1].steps if s.readings})
    assert "typed the wrong digit" in rep.html
    hist = rep.tables["revisions"]
    assert set(hist["revision"]) == {0, 1}


def test_outside_readings_bring_their_diagnosis_into_the_summary(archive: SQLiteArchive) -> None:
    rep = report_from_archive(archive, "sess-b")
    diag = rep.tables["diagnoses"]
    assert list(diag["diagnosis_code"]) == ["peak_for_rms"]
    rows = archive.readings("sess-b")
    assert int(diag["count"].iloc[0]) == int((rows["verdict"] == "outside").sum())
    largest = rep.tables["largest_deviations"]
    assert largest["relative_error"].abs().iloc[0] == pytest.approx(0.3, abs=0.02)
    assert "\u2717 outside" in rep.html  # verdicts carry a symbol and a word


def test_capture_drawn_decimated(archive: SQLiteArchive) -> None:
    rep = report_from_archive(archive, "sess-a")
    assert "Capture scope-01.csv" in rep.html
    assert "20000 samples at 10000 Hz" in rep.html
    block = rep.html[rep.html.index('aria-label="capture scope-01.csv"'):]
    block = block[: block.index("</svg>")]
    polylines = re.findall(r'<polyline points="([^"]*)"', block)
    assert polylines
    assert all(len(p.split()) <= 2 * 520 for p in polylines)


def test_sync_step_shows_its_closing_window(archive: SQLiteArchive) -> None:
    rep = report_from_archive(archive, "sess-a")
    assert "Closing window" in rep.html
    assert "permitted phase band" in rep.html
    bench = plan()[0]
    limits = bench.bench.sync_limits
    assert f"|dphi| &lt;= {limits.max_phase_difference:g} deg" in rep.html
    # window length from the field reference (1.4): 2 * dphi_limit / (360 * |slip|); the measured slip is
    # predicted x (1 + noise) here, so take it from the log
    rows = archive.readings("sess-a")
    slip = float(latest_revisions(rows).query("quantity == 'slip'")["measured"].iloc[0])
    want = 2 * limits.max_phase_difference / (360 * abs(slip))
    block = rep.html[rep.html.index("<h3>Closing window</h3>"):]
    widths = [float(w) for w in re.findall(r'<rect x="[^"]+" y="[^"]+" width="([^"]+)" height="[^"]+" '
                                           r'fill="#e3f1e6"', block[: block.index("</svg>")])]
    horizon = min(3 / abs(slip), 60.0)
    plot_px = 520.0 - 62.0 - 12.0
    inner = widths[1:-1] or widths  # the first and last windows may be cut by the plot edges
    assert inner[0] == pytest.approx(want / horizon * plot_px, rel=0.03)


def test_hash_mismatch_is_flagged() -> None:
    s = session_row("sess-x")
    good = session_report(s, readings_for(s))
    assert "does not match" not in good.html
    assert hashlib.sha256(s["template_text"].encode()).hexdigest() in good.html
    tampered = dict(s, template_sha256="0" * 64)
    assert "template_text does not match its stored template_sha256" in session_report(tampered,
                                                                                       readings_for(s)).html


def test_bad_input_is_named() -> None:
    s = session_row("sess-y")
    with pytest.raises(ReportError, match="missing column"):
        session_report(s, readings_for(s).drop(columns=["verdict"]))
    with pytest.raises(ReportError, match="bench_text and template_text"):
        session_report(dict(s, bench_text=""), readings_for(s))


def test_progress_is_reported_per_step() -> None:
    s = session_row("sess-p")
    calls: list[tuple[int, int, str]] = []
    session_report(s, readings_for(s), progress=lambda d, t, w: calls.append((d, t, w)))
    n = len(plan()[1].steps)
    assert calls[0] == (0, n, "step start-ref")
    assert calls[-1] == (n, n, "summary")


def test_tables_export_guards_formula_cells(tmp_path: Path) -> None:
    s = session_row("sess-t")
    rows = readings_for(s, note="=HYPERLINK(\"http://x\",\"y\")")
    rows.loc[1, "note"] = "+1+2"
    rows.loc[2, "note"] = "@SUM(A1)"
    rows.loc[3, "note"] = "\tx"
    rep = session_report(s, rows)
    csv_paths = write_tables(rep.tables, tmp_path / "csv", "csv", prefix="session-")
    frame = pd.read_csv(tmp_path / "csv" / "session-readings.csv", keep_default_na=False)
    notes = set(frame["note"])
    assert "'=HYPERLINK(\"http://x\",\"y\")" in notes
    assert "'+1+2" in notes
    assert "'@SUM(A1)" in notes
    assert "'\tx" in notes
    assert frame["measured"].dtype == float  # numbers stay numbers (a negative value is not text)
    assert {p.name for p in csv_paths} >= {"session-readings.csv", "session-verdicts.csv", "session-revisions.csv"}
    write_tables(rep.tables, tmp_path / "xlsx", "xlsx")
    from openpyxl import load_workbook

    sheet = load_workbook(tmp_path / "xlsx" / "readings.xlsx").active
    header = [c.value for c in next(sheet.iter_rows(max_row=1))]
    col = header.index("note")
    values = {row[col].value for row in sheet.iter_rows(min_row=2)}
    assert "'+1+2" in values
    assert all(not (isinstance(v, str) and v[:1] in "=+-@") for v in values)
    write_tables(rep.tables, tmp_path / "pq", "parquet")
    back = pd.read_parquet(tmp_path / "pq" / "readings.parquet")
    assert "+1+2" in set(back["note"])  # Parquet is not evaluated by spreadsheets: kept as is
    with pytest.raises(ReportError, match="table-format"):
        write_tables(rep.tables, tmp_path, "ods")


def _chromium_or_skip() -> None:
    from labkit.report.pdf import find_chromium

    if find_chromium() is None:
        if os.environ.get("CI"):
            pytest.fail("CI is set but no Chromium is installed (apt-get install -y chromium)")
        pytest.skip("no Chromium installed")


def test_pdf_through_headless_chromium(tmp_path: Path) -> None:
    _chromium_or_skip()
    from labkit.report.pdf import html_to_pdf

    s = session_row("sess-pdf")
    html_path = session_report(s, readings_for(s)).write(tmp_path / "r.html")
    pdf = html_to_pdf(html_path, tmp_path / "r.pdf")
    data = pdf.read_bytes()
    assert data.startswith(b"%PDF-")
    # one page break per step at least: count page objects (ISO 32000 /Type /Page)
    assert len(re.findall(rb"/Type\s*/Page[^s]", data)) >= len(plan()[1].steps)


def test_prelab_sheet_lists_every_prediction_with_its_band() -> None:
    from labkit.core.predict import predict_template

    bench, template, bench_text, template_text, *_ = plan()
    rep = prelab_sheet(bench, template, n_samples=200, seed=7, bench_text=bench_text, template_text=template_text)
    steps = predict_template(bench, template, n_samples=200, seed=7)
    for step, sp in zip(template.steps, steps, strict=True):
        assert f"[{step.id}, {step.kind}]" in rep.html
        for spec in step.readings:
            value, low, high = sp.prediction.reading(spec.location, spec.quantity, spec.sensor)
            for v in (value, low, high):
                assert f">{v:.4g}<" in rep.html
    assert DEFER.replace("'", "&#x27;") in rep.html
    assert hashlib.sha256(template_text.encode()).hexdigest() in rep.html
    assert set(rep.tables["predictions"]["step"]) == {s.id for s in template.steps}
