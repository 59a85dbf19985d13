"""The session report: one self-contained HTML page a TA hands back to a group.

:func:`session_report` takes a session row and that session's log tables
(shaped by :mod:`labkit.logbook.schema`), rebuilds the bench and template from
the texts stored with the session, and renders: the header, the cautions, per
step the configuration diagram, predicted-versus-measured table, phasor
diagram, captures and trends, closing window (synchronize steps), corrections
with their history and notes; then a summary and the provenance.
:func:`report_from_archive` does the same from an :class:`~labkit.logbook.storage.Archive`.

Only rows of the session's own section, group and session id are used: a
group's report never shows another group's readings.
"""

from __future__ import annotations

import json
import math
import tempfile
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from labkit import __version__
from labkit.core.cautions import DEFER, step_cautions
from labkit.core.diagram import bench_diagram
from labkit.core.errors import LabkitError
from labkit.core.network import NetworkError
from labkit.core.predict import Prediction, predict_state
from labkit.core.state import BenchState, states_after_steps
from labkit.report.common import (
    REQUIRED_READING,
    REQUIRED_SESSION,
    Progress,
    ReportError,
    is_angle_quantity,
    latest_revisions,
    no_progress,
    relative_error,
    require_columns,
    session_files,
    unit_of,
)
from labkit.report.html import esc, fmt, markdown, page, table, verdict_html
from labkit.report.svg import Phasor, Series, diagram_svg, line_chart, phasor_svg

CaptureLoader = Callable[[str], tuple[str, bytes]]


@dataclass
class Report:
    """A rendered report: the HTML page and the tables behind it (for CSV/Parquet/Excel export)."""

    html: str
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    title: str = ""

    def write(self, path: str | Path) -> Path:
        """Write the HTML page (UTF-8)."""
        out = Path(path)
        out.write_text(self.html, encoding="utf-8")
        return out


# -- header -----------------------------------------------------------------------------------------
def _people(session: Mapping[str, Any], roster: pd.DataFrame | None) -> str:
    raw = session.get("people") or "[]"
    try:
        people = json.loads(raw)
    except (TypeError, ValueError):
        people = [str(raw)]
    if not isinstance(people, list):
        people = [people]
    names: dict[str, str] = {}
    if roster is not None and not roster.empty:
        names = dict(zip(roster["participant_id"].astype(str), roster["name"].astype(str), strict=True))
    shown = [f"{names[p]} ({p})" if str(p) in names else str(p) for p in map(str, people)]
    return ", ".join(shown)


def _header(session: Mapping[str, Any], title: str, roster: pd.DataFrame | None) -> str:
    created = pd.Timestamp(session.get("created_at")) if session.get("created_at") is not None else None
    date = created.strftime("%Y-%m-%d %H:%M UTC") if created is not None and not pd.isna(created) else ""
    rows = [("section", session.get("section")), ("group", session.get("group")), ("cart", session.get("cart")),
            ("date", date), ("session", session.get("session_id")),
            ("kind / state", f"{session.get('kind', '')} / {session.get('state', '')}"),
            ("people", _people(session, roster))]
    kind = session.get("kind", "")
    banner = (f'<p class="flag">This is a {esc(kind)} session (not part of the lab record).</p>'
              if kind in ("demo", "practice") else "")
    return f"<h1>{esc(title)}</h1>{banner}" + table(["", ""], rows, cls="meta")


# -- per step --------------------------------------------------------------------------------------
def _prediction(bench: object, state: BenchState) -> tuple[Prediction | None, str]:
    try:
        return predict_state(bench, state, n_samples=0, harmonics=True), ""  # type: ignore[arg-type]
    except (NetworkError, LabkitError) as exc:
        return None, str(exc)


def _phasors(pred: Prediction, current_locations: list[str]) -> list[Phasor]:
    values = {(lab.location, lab.quantity): float(pred.nominal[k]) for k, lab in enumerate(pred.labels)}
    out = [Phasor(bus, values[(bus, "v_rms")], values[(bus, "v_angle")], "voltage")
           for bus in pred.network.bench.bus_names if (bus, "v_angle") in values]
    for loc in current_locations[:8]:
        if (loc, "i_angle") in values and values.get((loc, "i_rms"), 0.0) > 0:
            out.append(Phasor(loc, values[(loc, "i_rms")], values[(loc, "i_angle")], "current"))
    return out


def _readings_table(step_rows: pd.DataFrame, revisions: pd.Series, step: object,
                    pred: Prediction | None) -> str:
    rows = []
    taken = set()
    for r in step_rows.itertuples(index=False):
        taken.add((r.location, r.quantity))
        rel = relative_error([r.measured], [r.predicted])[0]
        deviation = (f"{r.measured - r.predicted:+.3g} {r.unit}" if is_angle_quantity(r.quantity)
                     else ("" if math.isnan(rel) else f"{100 * rel:+.2f} %"))
        rows.append([r.location, r.quantity, r.unit, fmt(r.predicted), f"{fmt(r.band_low)} \u2026 {fmt(r.band_high)}",
                     fmt(r.tolerance), r.measured, esc(deviation), esc(r.entered), verdict_html(str(r.verdict)),
                     esc(r.diagnosis if isinstance(r.diagnosis, str) else ""),
                     esc(int(revisions.get(r.reading_id, 0)))])
    for spec in getattr(step, "readings", []):
        if (spec.location, spec.quantity) in taken:
            continue
        predicted, band = "", ""
        if pred is not None:
            try:
                value, low, high = pred.reading(spec.location, spec.quantity, spec.sensor)
                predicted, band = fmt(value), f"{fmt(low)} \u2026 {fmt(high)} (nominal solve)"
            except KeyError:
                predicted = "no prediction"
        rows.append([spec.location, spec.quantity, spec.unit, predicted, band, esc(spec.tolerance), "", "",
                     '<span class="muted">not taken</span>', verdict_html("unchecked"), "", "0"])
    if not rows:
        return '<p class="muted">No readings in this step.</p>'
    headers = ["location", "quantity", "unit", "predicted", "band (5-95 %)", "tolerance", "measured",
               "deviation", "entered", "verdict", "diagnosis", "corrections"]
    numeric = [False, False, False, True, False, True, True, False, False, False, False, True]
    return table(headers, rows, numeric=numeric, raw_columns=(3, 4, 5, 7, 8, 9, 10, 11))


def _corrections(all_rows: pd.DataFrame, step_id: str) -> str:
    part = all_rows[all_rows["step_id"] == step_id]
    corrected = part.groupby("reading_id", observed=True)["revision"].max()
    ids = corrected[corrected > 0].index
    if len(ids) == 0:
        return ""
    hist = part[part["reading_id"].isin(ids)].sort_values(["reading_id", "revision"])
    rows = [[r.location, r.quantity, int(r.revision), r.measured, r.entered, verdict_html(str(r.verdict)),
             r.reason if isinstance(r.reason, str) else "", r.recorded_by, str(r.recorded_at)]
            for r in hist.itertuples(index=False)]
    return ("<h3>Corrections (every revision)</h3>"
            + table(["location", "quantity", "revision", "measured", "entered", "verdict", "reason", "by", "at"],
                    rows, numeric=[False, False, True, True, False, False, False, False, False], raw_columns=(5,)))


def _notes(step_rows: pd.DataFrame, events: pd.DataFrame | None, step_id: str) -> str:
    notes = [(f"{r.location} {r.quantity}", r.note) for r in step_rows.itertuples(index=False)
             if isinstance(r.note, str) and r.note]
    if events is not None and not events.empty:
        ev = events[(events["event"] == "note") & (events["step_id"].fillna("") == step_id)]
        for e in ev.itertuples(index=False):
            detail = e.detail if isinstance(e.detail, str) else ""
            try:
                parsed = json.loads(detail) if detail else ""
                text = parsed.get("text", detail) if isinstance(parsed, dict) else str(parsed)
            except ValueError:
                text = detail
            notes.append((f"note by {e.by}", text))
    if not notes:
        return ""
    return "<h3>Notes</h3><ul>" + "".join(f"<li><strong>{esc(w)}</strong>: {esc(t)}</li>" for w, t in notes) + "</ul>"


def _captures(step_rows: pd.DataFrame, load_capture: CaptureLoader | None) -> str:
    if load_capture is None:
        return ""
    ids = [c for c in step_rows["capture_id"].fillna("").unique() if c]
    if not ids:
        return ""
    from labkit.captures.capture import read_capture

    parts = []
    for cid in ids:
        try:
            name, data = load_capture(cid)
            suffix = Path(name).suffix or ".csv"
            with tempfile.TemporaryDirectory() as tmp:
                path = Path(tmp) / f"capture{suffix}"
                path.write_bytes(data)
                cap = read_capture(path)
        except (LabkitError, OSError, KeyError) as exc:
            parts.append(f'<p class="muted">Capture {esc(cid)} could not be shown: {esc(exc)}</p>')
            continue
        t = cap.t0 + np.arange(cap.data.shape[1]) / cap.sample_rate
        for unit in sorted(set(cap.units) or {""}):
            chans = [k for k in range(cap.data.shape[0]) if (cap.units[k] if cap.units else "") == unit]
            series = [Series(cap.channels[k], t, cap.data[k]) for k in chans]
            parts.append("<figure>" + line_chart(series, xlabel="time (s)", ylabel=f"sample ({unit or 'raw'})",
                                                 title=f"capture {name}")
                         + f"<figcaption>Capture {esc(name)} ({esc(cid[:12])}), {cap.data.shape[1]} samples at "
                           f"{esc(f'{cap.sample_rate:g}')} Hz; drawn as min/max per pixel column."
                           "</figcaption></figure>")
    return "<h3>Captures</h3>" + "".join(parts)


def _trends(step_all_latest: pd.DataFrame) -> str:
    counts = step_all_latest.groupby(["location", "quantity"], observed=True)["reading_id"].nunique()
    repeated = counts[counts >= 2].index
    parts = []
    for loc, qty in list(repeated)[:6]:
        rows = step_all_latest[(step_all_latest["location"] == loc) & (step_all_latest["quantity"] == qty)]
        rows = rows.sort_values("seq")
        x = np.arange(1, len(rows) + 1, dtype=float)
        band = (float(rows["band_low"].iloc[-1]), float(rows["band_high"].iloc[-1]))
        chart = line_chart([Series(f"{loc} {qty}", x, rows["measured"].to_numpy(float), markers=True)],
                           xlabel="reading (in order taken)", ylabel=f"{qty} ({unit_of(qty)})", band=band,
                           band_label="predicted band")
        parts.append(f"<figure>{chart}<figcaption>Repeated readings of {esc(qty)} at {esc(loc)}."
                     "</figcaption></figure>")
    return ("<h3>Trends</h3>" + "".join(parts)) if parts else ""


def _sync_window(bench: object, step: object, pred: Prediction | None, step_rows: pd.DataFrame) -> str:
    from labkit.core.sync import SideState, limit_set, predict_sync

    if pred is None or getattr(step, "kind", "") != "synchronize":
        return ""
    sw = bench.switch(step.switch)  # type: ignore[attr-defined]
    values = {(lab.location, lab.quantity): float(pred.nominal[k]) for k, lab in enumerate(pred.labels)}
    measured = {r.quantity: float(r.measured) for r in step_rows.itertuples(index=False)
                if r.location == sw.id and np.isfinite(r.measured)}
    try:
        f_run = values[(sw.to_bus, "frequency")]
        slip = measured.get("slip", values.get((sw.id, "slip"), 0.0))
        v_in, v_run = values[(sw.from_bus, "v_rms")], values[(sw.to_bus, "v_rms")]
        src = bench.source(step.source)  # type: ignore[attr-defined]
        limits = limit_set(step.limits, sync_limits=bench.bench.sync_limits,  # type: ignore[attr-defined]
                           bench_id=bench.bench.id, rating_kva=src.rating / 1000.0)  # type: ignore[attr-defined]
        dphi0 = measured.get("dphi_sync", 0.0)
        sp = predict_sync(SideState(v_in, f_run + slip, dphi0), SideState(v_run, f_run, 0.0), limits,
                          closing_time_s=sw.closing_time, v_nominal=bench.bench.nominal_voltage)  # type: ignore[attr-defined]
    except (KeyError, LabkitError) as exc:
        return f'<p class="muted">No closing window: {esc(exc)}</p>'
    horizon = min(3 * sp.beat_period_s, 60.0) if math.isfinite(sp.beat_period_s) else 10.0
    t = np.linspace(0.0, horizon, 600)
    chart = line_chart([Series("phase difference (incoming - running)", t, sp.phase_trajectory(t))],
                       xlabel="time from the data (s)", ylabel="phase difference (deg)",
                       band=(-limits.max_dphi_deg, limits.max_dphi_deg), band_label="permitted phase band",
                       vspans=list(zip(sp.window_command_start_s, sp.window_command_end_s, strict=True)),
                       vspan_label="command windows (closing time allowed for)")
    basis = "measured" if "slip" in measured else "predicted"
    return (f"<h3>Closing window</h3><figure>{chart}<figcaption>{esc(limits.describe())}. Slip "
            f"{esc(f'{sp.slip_hz:+.3f}')} Hz ({basis}), dV {esc(f'{100 * sp.dv_running:+.2f}')} %, starting "
            f"phase difference {esc(f'{dphi0:+.1f}')} deg{' (measured)' if 'dphi_sync' in measured else ' (assumed)'}"
            f"; {esc(sp.verdict_if_closed_now.text)}. The supervisor decides when to close.</figcaption></figure>")


# -- summary ----------------------------------------------------------------------------------------
def summary_tables(latest: pd.DataFrame, top: int = 10) -> dict[str, pd.DataFrame]:
    """Verdict counts, the largest relative deviations, and the diagnoses found, from latest revisions."""
    verdicts = latest["verdict"].fillna("unchecked").value_counts().rename_axis("verdict").reset_index(name="count")
    frame = latest.assign(relative_error=relative_error(latest["measured"], latest["predicted"]))
    frame = frame[~frame["quantity"].map(is_angle_quantity).astype(bool)]
    frame = frame.assign(abs_rel=frame["relative_error"].abs()).dropna(subset=["abs_rel"])
    largest = frame.nlargest(top, "abs_rel")[["step_id", "location", "quantity", "predicted", "measured",
                                              "relative_error", "verdict"]]
    diag = latest[(latest["diagnosis_code"].fillna("") != "").astype(bool)]
    diagnoses = (diag.groupby(["diagnosis_code"], observed=True)
                 .agg(count=("reading_id", "size"), example=("diagnosis", "first"))
                 .reset_index().sort_values(["count", "diagnosis_code"], ascending=[False, True]))
    return {"verdicts": verdicts, "largest_deviations": largest.reset_index(drop=True),
            "diagnoses": diagnoses.reset_index(drop=True)}


def _summary_html(tables: Mapping[str, pd.DataFrame]) -> str:
    v = tables["verdicts"]
    out = ["<h2>Summary</h2>", table(["verdict", "count"],
                                     [[verdict_html(r.verdict), r.count] for r in v.itertuples(index=False)],
                                     numeric=[False, True], raw_columns=(0,))]
    largest = tables["largest_deviations"]
    if not largest.empty:
        out.append("<h3>Largest relative deviations</h3>")
        out.append(table(["step", "location", "quantity", "predicted", "measured", "deviation", "verdict"],
                         [[r.step_id, r.location, r.quantity, r.predicted, r.measured,
                           esc(f"{100 * r.relative_error:+.2f} %"), verdict_html(r.verdict)]
                          for r in largest.itertuples(index=False)],
                         numeric=[False, False, False, True, True, False, False], raw_columns=(5, 6)))
    diag = tables["diagnoses"]
    out.append("<h3>Diagnoses found</h3>")
    out.append(table(["diagnosis", "count", "example"], diag.itertuples(index=False), numeric=[False, True, False])
               if not diag.empty else '<p class="muted">none</p>')
    return "".join(out)


def _provenance(session: Mapping[str, Any], problems: tuple[str, ...]) -> str:
    rows = [("bench", f"{session.get('bench_id')} v{session.get('bench_version')}"),
            ("bench SHA-256", session.get("bench_sha256")),
            ("cart SHA-256", session.get("cart_sha256") or "(no cart override)"),
            ("template", f"{session.get('template_id')} v{session.get('template_version')}"),
            ("template SHA-256", session.get("template_sha256")),
            ("tolerance bands", f"Monte Carlo, seed {session.get('mc_seed')}, {session.get('mc_samples')} samples"),
            ("session made with", f"labkit {session.get('labkit_version')}"),
            ("report made with", f"labkit {__version__}")]
    flags = "".join(f'<p class="flag">Check: {esc(p)}.</p>' for p in problems)
    return "<h2>Provenance</h2>" + table(["", ""], rows, cls="meta") + flags


# -- the report -------------------------------------------------------------------------------------
def session_report(session: Mapping[str, Any], readings: pd.DataFrame, events: pd.DataFrame | None = None, *,
                   roster: pd.DataFrame | None = None, load_capture: CaptureLoader | None = None,
                   progress: Progress = no_progress) -> Report:
    """Render one session's report.

    Parameters
    ----------
    session
        The session row (``SESSION_COLUMNS``), with its stored bench and template texts.
    readings
        Reading rows (``READING_COLUMNS``, all revisions); rows of other sessions or groups are ignored.
    events
        Event rows of the session (``EVENT_COLUMNS``), for notes; optional.
    roster
        The roster (``ROSTER_COLUMNS``) when names should be shown; by default only participant ids appear.
    load_capture
        ``capture_id -> (name, bytes)`` (an archive's ``load_capture``) to draw captured waveforms.
    progress
        ``progress(done, total, what)`` per step.
    """
    missing = [k for k in REQUIRED_SESSION if k not in session]
    if missing:
        msg = f"session row: missing {', '.join(missing)}; expected the SESSION_COLUMNS of labkit.logbook.schema"
        raise ReportError(msg)
    require_columns(readings, REQUIRED_READING, "readings")
    sid = str(session["session_id"])
    same = ((readings["session_id"] == sid) & (readings["section"] == session["section"])
            & (readings["group"] == session["group"])).fillna(False).astype(bool)
    mine = readings[same].copy()
    mine["verdict"] = mine["verdict"].fillna("unchecked")
    if events is not None and not events.empty:
        events = events[events["session_id"] == sid]
    files = session_files(session)
    bench, template = files.bench, files.template
    latest = latest_revisions(mine)
    revisions = mine.groupby("reading_id", observed=True)["revision"].max() if not mine.empty else pd.Series(
        dtype="int64")
    states = states_after_steps(bench, template)
    title = f"{template.template.title} \u2014 session report"
    body = [_header(session, template.template.title, roster)]

    all_cautions: list[str] = list(template.template.cautions)
    step_parts = []
    total = len(template.steps)
    for index, (step, state) in enumerate(zip(template.steps, states, strict=True)):
        progress(index, total, f"step {step.id}")
        pred, error = _prediction(bench, state)
        cautions = step_cautions(bench, step, state, pred.rating_flags if pred else None)
        all_cautions += [c for c in cautions if c not in all_cautions]
        rows = latest[latest["step_id"] == step.id]
        sensors = {str(r.sensor): str(r.location) for r in rows.itertuples(index=False)
                   if isinstance(r.sensor, str) and r.sensor}
        sensors.update({spec.sensor: spec.location for spec in step.readings if spec.sensor})
        sensors = {k: v for k, v in sensors.items() if k in {s.id for s in bench.sensors}}
        diagram = bench_diagram(bench, state, sensors=sensors)
        part = [f'<section class="step"><h2>Step {index + 1}: {esc(step.title)} '
                f'<span class="muted">[{esc(step.id)}, {esc(step.kind)}]</span></h2>']
        part.append(markdown(step.instructions))
        part += [f'<div class="caution">{esc(c)}</div>' for c in cautions]
        part.append(f"<figure>{diagram_svg(diagram, label=f'configuration after step {step.id}')}"
                    f"<figcaption>Configuration after this step. {esc('; '.join(_state_words(bench, state)))}"
                    "</figcaption></figure>")
        if error:
            part.append(f'<p class="flag">This configuration cannot be predicted: {esc(error)}</p>')
        part.append(_readings_table(rows, revisions, step, pred))
        if pred is not None:
            currents = [r.location for r in step.readings if "@" in r.location]
            currents += [loc for loc in rows["location"].unique() if "@" in loc and loc not in currents]
            part.append("<figure>" + phasor_svg(_phasors(pred, currents), title=f"phasors, step {step.id}")
                        + "<figcaption>Predicted bus voltage and current phasors (nominal values; angles against "
                          "the reference source).</figcaption></figure>")
        part.append(_sync_window(bench, step, pred, rows))
        part.append(_captures(mine[mine["step_id"] == step.id], load_capture))  # any revision's capture
        part.append(_trends(rows))
        part.append(_corrections(mine, step.id))
        part.append(_notes(rows, events, step.id))
        part.append("</section>")
        step_parts.append("".join(part))
    progress(total, total, "summary")
    caution_html = ("<h2>Cautions</h2>" + "".join(f'<div class="caution">{esc(c)}</div>' for c in all_cautions)
                    + f'<p class="defer">{esc(DEFER)}</p>')
    extra = sorted(set(latest["step_id"]) - {s.id for s in template.steps}) if not latest.empty else []
    if extra:
        caution_html += f'<p class="flag">Readings of steps not in this template: {esc(", ".join(extra))}</p>'
    body.append(caution_html)
    body += step_parts
    tables = summary_tables(latest)
    body.append(_summary_html(tables))
    body.append(_provenance(session, files.hash_problems))
    tables["readings"] = latest.reset_index(drop=True)
    tables["revisions"] = mine.sort_values(["reading_id", "revision"]).reset_index(drop=True)
    data = {"kind": "labkit-session-report", "session_id": sid, "labkit_version": __version__,
            "template": {"id": session.get("template_id"), "version": session.get("template_version"),
                         "sha256": session.get("template_sha256")},
            "bench": {"id": session.get("bench_id"), "version": session.get("bench_version"),
                      "sha256": session.get("bench_sha256")},
            "verdicts": {r.verdict: int(r.count) for r in tables["verdicts"].itertuples(index=False)}}
    return Report(page(title, "".join(body), data=data), tables, title)


def _state_words(bench: object, state: BenchState) -> list[str]:
    from labkit.core.state import describe_state

    return describe_state(bench, state)  # type: ignore[arg-type]


def report_from_archive(archive: object, session_id: str, *, with_names: bool = False,
                        progress: Progress = no_progress) -> Report:
    """The report of one session read from an archive (names from its roster only if ``with_names``)."""
    sessions = archive.sessions()  # type: ignore[attr-defined]
    match = sessions[sessions["session_id"] == session_id]
    if match.empty:
        msg = f'no session "{session_id}" in the archive'
        raise ReportError(msg)
    session = match.iloc[0].to_dict()
    readings = archive.readings(session_id)  # type: ignore[attr-defined]
    events = archive.events(session_id)  # type: ignore[attr-defined]
    roster = archive.roster() if with_names else None  # type: ignore[attr-defined]
    return session_report(session, readings, events, roster=roster, load_capture=archive.load_capture,  # type: ignore[attr-defined]
                          progress=progress)
