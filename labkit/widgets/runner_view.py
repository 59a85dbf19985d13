"""The bench-session view: one step at a time, its cautions and configuration, reading entry with verdicts.

Reading entry: each reading has a text field that takes the value with its unit (``118.6 V``,
``850 mA``) and commits on Enter or when the field loses focus (``continuous_update=False``, so
nothing runs per keystroke). The parsed value is echoed; the verdict (symbol and word) appears at
once, marked "recording..." until the archive has committed the row; the diagnosis follows. A
reading that could not be recorded stays in its field, marked NOT RECORDED, with a retry button.
Entering a reading that is already recorded is a correction and needs a reason.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import ipywidgets as w

from labkit.core.errors import LabkitError
from labkit.logbook.storage import NotRecordedError
from labkit.widgets.capture import CapturePanel
from labkit.widgets.sync_panel import SyncPanel
from labkit.widgets.text import Safe, esc, lines, message, num, set_choices, verdict_badge

if TYPE_CHECKING:
    from labkit.session.readings import ParsedReading
    from labkit.session.runner import Entry, ExpectedReading, SessionRunner, StepView
    from labkit.widgets.workspace import Workspace

FORM_CHOICES = (("rms", "rms"), ("peak", "peak"), ("peak-peak", "peak_to_peak"), ("average", "average"))
COLUMN_WIDTHS = ("200px", "100px", "170px", "170px", "95px", "190px")


@dataclass
class ReadingRow:
    """The widgets of one reading of the step."""

    spec_index: int
    expected: ExpectedReading
    label: w.HTML
    predicted: w.HTML
    band: w.HTML
    entry: w.Text
    form: w.Dropdown
    verdict: w.HTML
    echo: w.HTML
    diagnosis: w.HTML
    retry: w.Button
    box: w.VBox
    pending: Entry | None = None


def _band_text(exp: ExpectedReading) -> str:
    if not math.isfinite(exp.band_low):
        return exp.missing or "no prediction"
    return f"{num(exp.band_low)} \u2026 {num(exp.band_high)}"


class RunnerView:
    """The session runner's widgets; a thin layer over :class:`~labkit.session.runner.SessionRunner`.

    Parameters
    ----------
    workspace
        The working folder (captures, reports, last-session note).
    progress
        ``progress(done, total, what)`` for long computations (the app's progress bar).
    """

    def __init__(self, workspace: Workspace, progress: Callable[[int, int, str], None] | None = None) -> None:
        self.workspace = workspace
        self.progress = progress or (lambda _d, _t, _w: None)
        self.runner: SessionRunner | None = None
        self.rows: list[ReadingRow] = []
        self.strip = w.HTML(message("No session yet: create one in the Plan tab, or resume one from Review.", "info"))
        self.actor = w.Dropdown(description="Entering as", options=[], layout=w.Layout(width="300px"))
        self.actor.observe(self._actor_changed, names="value")
        self.open_button = w.Button(description="Open session",
                                   layout=w.Layout(width="auto"), tooltip="planned -> open: readings can be taken")
        self.open_button.on_click(lambda _b: self._transition("open"))
        self.submit_button = w.Button(description="Hand in (submit)",
                                   layout=w.Layout(width="auto"), tooltip="open -> submitted")
        self.submit_button.on_click(lambda _b: self._transition("submitted"))
        self.back_button = w.Button(description="\u2190 Back",
                                   layout=w.Layout(width="auto"), tooltip="go back one step")
        self.back_button.add_class("lk-back")
        self.back_button.on_click(lambda _b: self._move("back"))
        self.next_button = w.Button(description="Step done: next \u2192",
                                   layout=w.Layout(width="auto"), tooltip="perform this step, go to the next")
        self.next_button.add_class("lk-next")
        self.next_button.on_click(lambda _b: self._move("forward"))
        self.skip_reason = w.Text(placeholder="reason to skip this step", layout=w.Layout(width="260px"))
        self.skip_reason.add_class("lk-skip-reason")
        self.skip_button = w.Button(description="Skip step (with reason)", layout=w.Layout(width="auto"))
        self.skip_button.add_class("lk-skip")
        self.skip_button.on_click(lambda _b: self._move("skip"))
        self.notice = w.HTML()
        self.steps = w.HTML(layout=w.Layout(width="250px"))
        self.step_head = w.HTML()
        self.cautions = w.HTML()
        self.diagram = w.HTML()
        self.diagram.add_class("lk-diagram")
        self.state_words = w.HTML()
        self.reason = w.Text(description="Reason for correction", placeholder="needed to change a recorded reading",
                             layout=w.Layout(width="520px"), style={"description_width": "160px"})
        self.reason.add_class("lk-reason")
        self.reason.continuous_update = False
        self.reason.observe(lambda _c: self._reason_given(), names="value")
        self._awaiting_reason: tuple[ReadingRow, ParsedReading] | None = None
        self.table = w.VBox()
        self.table.add_class("lk-readings")
        self.as_found = w.VBox()
        self.outlook = w.HTML()
        self.capture = CapturePanel(workspace, self.take_parsed)
        self.sync = SyncPanel()
        self.sync_box = w.VBox()
        self.report_button = w.Button(description="Export session report", layout=w.Layout(width="auto"))
        self.report_button.add_class("lk-report")
        self.report_button.on_click(lambda _b: self.export_report())
        self.report_out = w.HTML()
        controls = w.HBox([self.back_button, self.next_button, self.skip_reason, self.skip_button])
        card = w.VBox([self.step_head, self.cautions, w.HBox([self.diagram]), self.state_words,
                       w.HTML('<div class="lk-head">Readings</div>'), self.table, self.reason, self.as_found,
                       self.outlook, self.sync_box, self.capture.widget,
                       w.HBox([self.report_button]), self.report_out], layout=w.Layout(flex="1 1 auto"))
        self.widget = w.VBox([self.strip, w.HBox([self.actor, self.open_button, self.submit_button]), controls,
                              self.notice, w.HBox([self.steps, card])])
        self.widget.add_class("lk-runner")
        self._refresh_controls()

    # -- attaching a runner --------------------------------------------------------------------------
    def attach(self, runner: SessionRunner, note: str = "") -> None:
        """Show a runner (a new session, or one resumed from the archive)."""
        self.runner = runner
        people = runner.people
        staff = runner.session.get("created_by") or runner.actor.id
        options = [(f"{p} (student)", f"{p}|student") for p in people]
        options.append((f"{staff} (staff)", f"{staff}|ta"))
        self.actor.unobserve(self._actor_changed, names="value")
        set_choices(self.actor, options)
        current = f"{runner.actor.id}|{runner.actor.role}"
        self.actor.value = current if current in dict((v, k) for k, v in options) else options[0][1]
        self.actor.observe(self._actor_changed, names="value")
        self._actor_changed({"new": self.actor.value})
        self.notice.value = message(note, "ok") if note else ""
        self.render()

    def _actor_changed(self, change: dict[str, Any]) -> None:
        from labkit.session.runner import Actor

        if self.runner is None or not change.get("new"):
            return
        who, _, role = str(change["new"]).partition("|")
        self.runner.actor = Actor(who, role)
        self.workspace.remember_session(self.runner.session_id, who, role)

    # -- drawing -------------------------------------------------------------------------------------
    def render(self) -> None:
        """Redraw everything for the current step."""
        self._awaiting_reason = None
        r = self.runner
        if r is None:
            return
        view = r.view()
        self._render_strip(view)
        self._render_steps(view)
        self._render_step(view)
        self._render_rows(view)
        self.capture.set_runner(r)
        self._render_extras(view)
        self._refresh_controls()

    def _render_strip(self, view: StepView) -> None:
        r = self.runner
        assert r is not None
        s = r.session
        tpl = r.template.template
        n = len(r.template.steps)
        self.strip.value = Safe(
            '<div class="lk-strip">'
            f"<b>{esc(tpl.title)}</b> &nbsp;|&nbsp; section <b>{esc(s['section'])}</b>, group <b>{esc(s['group'])}"
            f"</b>, cart <b>{esc(s['cart'])}</b> &nbsp;|&nbsp; people {esc(', '.join(r.people))}"
            f" &nbsp;|&nbsp; session <span class=\"lk-state\">{esc(r.state_name.upper())}</span>"
            f" &nbsp;|&nbsp; step <b>{view.index + 1} of {n}</b>"
            f'<div class="lk-muted">predictions anchored on: {esc(view.anchor)}; session id {esc(r.session_id)}'
            "</div></div>")

    def _render_steps(self, view: StepView) -> None:
        r = self.runner
        assert r is not None
        recorded = {e.parsed.step_index for e in r.entries if e.status == "recorded"}
        items = []
        for i, step in enumerate(r.template.steps):
            if i == view.index:
                mark, cls = "\u25b6 now", "lk-here"
            elif i in r.skipped:
                mark, cls = "\u21b7 skipped", ""
            elif i < view.index:
                mark, cls = "\u2713 done", ""
            else:
                mark, cls = "\u00b7 to do", ""
            count = sum(1 for e in r.entries if e.status == "recorded" and e.parsed.step_index == i and
                        e.revision == 0)
            extra = f" ({count} recorded)" if i in recorded else ""
            items.append(f'<div class="{cls}">{i + 1}. {esc(step.title)}<br><span class="lk-muted">{mark}{extra}'
                         "</span></div>")
        self.steps.value = Safe('<div class="lk-head">Steps</div><div class="lk-steps">' + "".join(items) + "</div>")

    def _render_step(self, view: StepView) -> None:
        from labkit.core.cautions import DEFER
        from labkit.core.diagram import bench_diagram
        from labkit.core.state import describe_state
        from labkit.report.html import markdown
        from labkit.report.svg import diagram_svg

        r = self.runner
        assert r is not None
        step = view.step
        skipped = f'<div class="lk-msg"><b>Skipped:</b> {esc(view.skipped)}</div>' if view.skipped else ""
        self.step_head.value = Safe(
            f'<div class="lk-big">Step {view.index + 1}: {esc(step.title)}</div>'
            f'<div class="lk-muted">{esc(step.kind)} [{esc(step.id)}]</div>{skipped}'
            f"{markdown(getattr(step, 'instructions', '') or '')}")
        warn = [f"prediction warning: {x}" for x in view.warnings]
        if view.error:
            warn.insert(0, f"this configuration cannot be predicted: {view.error}")
        self.cautions.value = Safe(lines(view.cautions, "lk-caution") + lines(warn, "lk-msg lk-msg-problem")
                                   + f'<div class="lk-defer">{esc(DEFER)}</div>')
        sensors = {e.sensor: e.spec.location for e in view.expected if e.sensor}
        try:
            diagram = bench_diagram(r.bench, view.state, sensors=sensors)
            self.diagram.value = Safe(diagram_svg(diagram, label=f"configuration at step {step.id}"))
        except (LabkitError, KeyError, ValueError) as exc:
            self.diagram.value = message(f"no diagram for this configuration: {exc}", "problem")
        self.state_words.value = Safe('<div class="lk-head">Bench now</div>'
                                      + lines(describe_state(r.bench, view.state)))

    def _render_rows(self, view: StepView) -> None:
        self.rows = [self._make_row(exp) for exp in view.expected]
        head = w.HBox([w.HTML(f'<span class="lk-head">{esc(t)}</span>', layout=w.Layout(width=wd))
                       for t, wd in zip(("reading", "predicted", "band (5-95 %)", "your value", "as read", "verdict"),
                                        COLUMN_WIDTHS, strict=True)])
        if not self.rows:
            self.table.children = [w.HTML(esc("This step has no readings to take."))]
            return
        self.table.children = [head, *(row.box for row in self.rows)]
        for row in self.rows:
            latest = self.latest_entry(view.index, row.spec_index)
            if latest is not None:
                self._show_entry(row, latest)

    def _make_row(self, exp: ExpectedReading) -> ReadingRow:
        spec = exp.spec
        unit = spec.unit or exp.unit
        label = w.HTML(Safe(f"<b>{esc(spec.quantity)}</b> at {esc(spec.location)}"
                            f'<div class="lk-muted">unit {esc(unit)}; tolerance {esc(spec.tolerance)}</div>'),
                       layout=w.Layout(width=COLUMN_WIDTHS[0]))
        factor = self._display_factor(spec.quantity, unit)
        shown = f"{num(exp.predicted / factor, 5)} {unit}" if math.isfinite(exp.predicted) else "\u2014"
        predicted = w.HTML(esc(shown),
                           layout=w.Layout(width=COLUMN_WIDTHS[1]))
        band = _band_text(exp) if not math.isfinite(exp.band_low) else \
            f"{num(exp.band_low / factor, 5)} \u2026 {num(exp.band_high / factor, 5)} {unit}"
        band_w = w.HTML(esc(band), layout=w.Layout(width=COLUMN_WIDTHS[2]))
        entry = w.Text(placeholder=f"e.g. {num(exp.predicted / factor, 3) if math.isfinite(exp.predicted) else '1'}"
                                   f" {unit}", continuous_update=False, layout=w.Layout(width=COLUMN_WIDTHS[3]))
        entry.add_class("lk-entry")
        entry.add_class(f"lk-entry-{exp.spec_index}")
        form = w.Dropdown(options=FORM_CHOICES, value="rms", layout=w.Layout(width=COLUMN_WIDTHS[4]))
        verdict = w.HTML(esc("no reading yet"), layout=w.Layout(width=COLUMN_WIDTHS[5]))
        verdict.add_class(f"lk-verdict-{exp.spec_index}")
        echo = w.HTML()
        echo.add_class("lk-echo")
        diagnosis = w.HTML()
        diagnosis.add_class(f"lk-diagnosis-{exp.spec_index}")
        retry = w.Button(description="Retry recording", layout=w.Layout(width="auto", display="none"))
        box = w.VBox([w.HBox([label, predicted, band_w, entry, form, verdict]), w.HBox([echo, retry]), diagnosis])
        box.add_class("lk-row")
        row = ReadingRow(exp.spec_index, exp, label, predicted, band_w, entry, form, verdict, echo, diagnosis, retry,
                         box)
        entry.observe(lambda change, row=row: self._entered(row, change["new"]), names="value")
        retry.on_click(lambda _b, row=row: self.retry(row))
        return row

    @staticmethod
    def _display_factor(quantity_name: str, unit: str) -> float:
        from labkit.session.readings import _display_factor

        try:
            return _display_factor(quantity_name, unit)
        except LabkitError:
            return 1.0

    def _render_extras(self, view: StepView) -> None:
        kind = view.step.kind
        if kind == "synchronize":
            self.sync.set_view(view, self.runner.bench.bench.nominal_voltage if self.runner else None)
            self.sync_box.children = [self.sync.widget]
        else:
            self.sync_box.children = []
        if view.frequency is not None:
            self.outlook.value = Safe('<div class="lk-head">Frequency after this load step</div>'
                                      + lines(view.frequency.lines))
        else:
            self.outlook.value = ""
        self.as_found.children = self._as_found_widgets(view) if kind == "source_start" else []

    def _as_found_widgets(self, view: StepView) -> list[w.Widget]:
        r = self.runner
        assert r is not None
        v = w.Text(description="as-found V", placeholder="e.g. 118.6 V", continuous_update=False)
        f = w.Text(description="as-found f", placeholder="e.g. 59.98 Hz", continuous_update=False)
        out = w.HTML()
        af = r.anchors.get(getattr(view.step, "source", ""))
        if af is not None:
            out.value = message(f"recorded: {af.label}", "ok")
        button = w.Button(description="Record as-found values", layout=w.Layout(width="auto"),
                          tooltip="later steps are predicted from the source as found")

        def record(_b: object) -> None:
            try:
                found = r.set_as_found(v.value, f.value)
            except LabkitError as exc:
                out.value = message(str(exc), "problem")
                return
            out.value = message(f"recorded: {found.label}; later steps are predicted from it", "ok")

        button.on_click(record)
        return [w.HTML('<div class="lk-head">Source as found</div>'), w.HBox([v, f, button]), out]

    # -- entering readings ---------------------------------------------------------------------------
    def latest_entry(self, step_index: int, spec_index: int) -> Entry | None:
        """The latest recorded entry of a reading (highest revision), or None."""
        if self.runner is None:
            return None
        found = [e for e in self.runner.entries if e.status == "recorded" and e.parsed.step_index == step_index
                 and e.parsed.spec_index == spec_index]
        return max(found, key=lambda e: (e.revision, int((e.row or {}).get("seq", 0) or 0))) if found else None

    def _entered(self, row: ReadingRow, text: str) -> None:
        if not text.strip() or self.runner is None:
            return
        r = self.runner
        try:
            parsed = r.parse(row.spec_index, text, form=row.form.value)
        except LabkitError as exc:
            row.echo.value = Safe(f'<span class="lk-echo"><b>Not understood:</b> {esc(exc)}</span>')
            row.verdict.value = esc("not recorded")
            return
        self.commit(row, parsed)

    def take_parsed(self, parsed: ParsedReading) -> None:
        """Record a reading taken from a capture (the capture panel's hand-over)."""
        row = next((x for x in self.rows if x.spec_index == parsed.spec_index), None)
        if row is None:
            return
        self.commit(row, parsed)

    def commit(self, row: ReadingRow, parsed: ParsedReading) -> None:
        """Show the verdict at once, then record through the archive and show the committed row."""
        from labkit.session.runner import ANGLE_QUANTITIES, SessionError
        from labkit.session.verdict import verdict

        r = self.runner
        assert r is not None
        exp = row.expected
        previous = self.latest_entry(parsed.step_index, parsed.spec_index)
        reason = self.reason.value.strip()
        if previous is not None and not reason:
            self._awaiting_reason = (row, parsed)
            row.echo.value = Safe(f'<span class="lk-echo">{esc(parsed.echo)}</span>')
            row.verdict.value = message(
                f"already recorded as {previous.parsed.entered}: this is a correction. Type its reason in "
                "'Reason for correction' and press Enter there; your new value is kept here until then", "problem")
            return
        self._awaiting_reason = None
        if previous is not None:  # consumed now, before anything shows: a reason typed next is never wiped
            self.reason.value = ""
        # the verdict first (cheap), so it shows before the archive write and the diagnosis
        tol, _ = r.tolerance(exp.spec, parsed, exp.predicted) if math.isfinite(exp.predicted) else (math.nan, "")
        quick = verdict(parsed.value, exp.band_low, exp.band_high, tol, predicted=exp.predicted,
                        angle=parsed.quantity in ANGLE_QUANTITIES)
        row.verdict.value = verdict_badge(quick, pending=True)
        row.echo.value = Safe(f'<span class="lk-echo">{esc(parsed.echo)}</span>')
        row.diagnosis.value = ""
        try:
            if previous is not None:
                r.correct(previous.reading_id, parsed, reason=reason)
            else:
                r.record(parsed)
        except NotRecordedError as exc:
            row.pending = r.not_recorded[-1] if r.not_recorded else None
            self._show_not_recorded(row, str(exc))
            return
        except (SessionError, LabkitError) as exc:
            if previous is not None and not self.reason.value:
                self.reason.value = reason  # nothing was recorded: the reason stays for another try
            row.verdict.value = message(f"not recorded: {exc}", "problem")
            return
        entry = self.latest_entry(parsed.step_index, parsed.spec_index)
        if entry is not None:
            self._show_entry(row, entry)
        row.entry.value = ""  # an empty value is ignored by the observer; the recorded text is in the echo
        self._focus_next(row)
        if parsed.quantity == "slip" and self.sync_box.children:
            self.sync.apply_slip(parsed.value)
        self._render_steps(r.view())

    def _reason_given(self) -> None:
        if self._awaiting_reason is None or not self.reason.value.strip():
            return
        row, parsed = self._awaiting_reason
        if row in self.rows:
            self.commit(row, parsed)

    def _focus_next(self, row: ReadingRow) -> None:
        k = self.rows.index(row)
        if k + 1 < len(self.rows):
            self.rows[k + 1].entry.focus()

    def _show_entry(self, row: ReadingRow, entry: Entry) -> None:
        data = entry.row or {}
        v = str(data.get("verdict") or "unchecked")
        seq = data.get("seq")
        rev = int(data.get("revision") or 0)
        row.verdict.value = verdict_badge(v)
        what = f"recorded #{seq}" if seq is not None else "recorded"
        if rev:
            what += f", correction {rev}: {data.get('reason') or ''}"
        row.echo.value = Safe(f'<span class="lk-echo">{esc(entry.parsed.echo or entry.parsed.entered)} '
                              f"\u2014 {esc(what)} by {esc(data.get('recorded_by') or entry.actor.id)} "
                              f"({esc(data.get('obtained') or entry.parsed.obtained)})</span>")
        diag = str(data.get("diagnosis") or "")
        row.diagnosis.value = Safe(f'<div class="lk-diag"><b>Likely cause:</b> {esc(diag)}</div>') if diag else ""
        row.retry.layout.display = "none"
        row.pending = None

    def _show_not_recorded(self, row: ReadingRow, reason: str) -> None:
        row.verdict.value = Safe('<span class="lk-verdict lk-v-outside"><b>! NOT RECORDED</b></span>')
        row.echo.value = Safe(f'<span class="lk-echo">{esc(reason)} \u2014 your value is kept; press '
                              "'Retry recording'</span>")
        row.retry.layout.display = ""

    def retry(self, row: ReadingRow) -> None:
        """Commit again a reading that was not recorded."""
        if self.runner is None or row.pending is None:
            return
        try:
            self.runner.retry(row.pending)
        except NotRecordedError as exc:
            row.pending = self.runner.not_recorded[-1] if self.runner.not_recorded else row.pending
            self._show_not_recorded(row, str(exc))
            return
        entry = self.latest_entry(row.pending.parsed.step_index, row.pending.parsed.spec_index)
        if entry is not None:
            self._show_entry(row, entry)

    # -- steps and states ----------------------------------------------------------------------------
    def _move(self, how: str) -> None:
        from labkit.session.runner import SessionError

        r = self.runner
        if r is None:
            return
        try:
            if how == "forward":
                r.forward()
            elif how == "back":
                r.back()
            else:
                r.skip(self.skip_reason.value)
                self.skip_reason.value = ""
        except (SessionError, LabkitError) as exc:
            self.notice.value = message(str(exc), "problem")
            return
        self.notice.value = ""
        self.render()

    def _transition(self, to: str) -> None:
        from labkit.session.runner import SessionError

        r = self.runner
        if r is None:
            return
        try:
            r.transition(to)
        except (SessionError, LabkitError) as exc:
            self.notice.value = message(str(exc), "problem")
            return
        self.notice.value = message(f"the session is now {r.state_name}", "ok")
        self.render()

    def _refresh_controls(self) -> None:
        r = self.runner
        state = r.state_name if r else ""
        for b in (self.back_button, self.next_button, self.skip_button):
            b.disabled = state != "open"
        if r is not None and state == "open":
            self.back_button.disabled = r.current == 0
            self.next_button.disabled = r.current >= len(r.template.steps) - 1
            self.skip_button.disabled = r.current >= len(r.template.steps) - 1
        self.open_button.disabled = state not in ("planned", "submitted")
        self.submit_button.disabled = state != "open"
        self.report_button.disabled = r is None

    # -- report --------------------------------------------------------------------------------------
    def export_report(self) -> None:
        """Render the session's report from the archive into ``reports/`` and show it (sandboxed)."""
        if self.runner is None:
            return
        from labkit.widgets.reports import show_report

        self.report_out.value = show_report(self.runner.archive, self.runner.session_id, self.workspace,
                                            self.progress)
