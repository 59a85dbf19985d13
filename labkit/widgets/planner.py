"""The planner: choose bench, cart and template, import a roster, name section, group and people, preview
every step's predicted readings with bands and cautions, export the pre-lab sheet, start the session."""

from __future__ import annotations

import contextlib
import math
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import ipywidgets as w

from labkit.core.errors import FileValidationError, LabkitError
from labkit.widgets.text import Safe, esc, lines, message, num, set_choices, table

if TYPE_CHECKING:
    from labkit.files.loader import LoadedBench, LoadedTemplate
    from labkit.session.runner import SessionRunner
    from labkit.widgets.workspace import Workspace

NO_CART = "(no cart file: bench type values)"
PREVIEW_SAMPLES = 400


class PlannerView:
    """Planner widgets.

    Parameters
    ----------
    workspace
        The working folder.
    on_start
        Called with the new runner when a session is created and opened.
    progress
        ``progress(done, total, what)`` for the preview and the pre-lab sheet.
    """

    def __init__(self, workspace: Workspace, on_start: Callable[[SessionRunner], None],
                 progress: Callable[[int, int, str], None] | None = None) -> None:
        self.workspace = workspace
        self.on_start = on_start
        self.progress = progress or (lambda _d, _t, _w: None)
        self.loaded: tuple[LoadedBench, LoadedTemplate] | None = None
        self.roster: list[dict[str, str]] = []
        wide = w.Layout(width="460px")
        style = {"description_width": "120px"}
        self.bench = w.Dropdown(description="Bench", layout=wide, style=style)
        self.cart = w.Dropdown(description="Cart", layout=wide, style=style)
        self.template = w.Dropdown(description="Template", layout=wide, style=style)
        self.load_button = w.Button(description="Load bench and template", layout=w.Layout(width="auto"))
        self.load_button.add_class("lk-load")
        self.load_button.on_click(lambda _b: self.load())
        self.loaded_note = w.HTML()
        self.roster_file = w.Dropdown(description="Roster CSV", layout=wide, style=style)
        self.roster_upload = w.FileUpload(accept=".csv", multiple=False, description="Upload roster CSV", icon="")
        self.roster_upload.observe(self._roster_uploaded, names="value")
        self.roster_button = w.Button(description="Import roster", layout=w.Layout(width="auto"))
        self.roster_button.add_class("lk-roster")
        self.roster_button.on_click(lambda _b: self.import_roster())
        self.roster_note = w.HTML()
        self.section = w.Combobox(description="Section", placeholder="e.g. S01", layout=wide, style=style,
                                  ensure_option=False)
        self.section.add_class("lk-section")
        self.group = w.Combobox(description="Group", placeholder="e.g. G1", layout=wide, style=style,
                                ensure_option=False)
        self.group.add_class("lk-group")
        self.people = w.Text(description="People present", placeholder="participant ids, comma-separated",
                             layout=wide, style=style)
        self.people.add_class("lk-people")
        self.staff = w.Text(description="Staff id", value="ta-demo", layout=wide, style=style)
        self.staff.add_class("lk-staff")
        self.section.observe(lambda _c: self._section_changed(), names="value")
        self.group.observe(lambda _c: self._group_changed(), names="value")
        self.preview_button = w.Button(description="Preview predicted readings", layout=w.Layout(width="auto"))
        self.preview_button.add_class("lk-preview")
        self.preview_button.on_click(lambda _b: self.preview())
        self.prelab_button = w.Button(description="Export pre-lab sheet", layout=w.Layout(width="auto"))
        self.prelab_button.on_click(lambda _b: self.export_prelab())
        self.start_button = w.Button(description="Create and open session", layout=w.Layout(width="auto"))
        self.start_button.add_class("lk-start")
        self.start_button.on_click(lambda _b: self.start())
        self.status = w.HTML()
        self.preview_out = w.HTML()
        self.widget = w.VBox([
            w.HTML('<div class="lk-head">1. Bench and template</div>'),
            self.bench, self.cart, self.template, w.HBox([self.load_button]), self.loaded_note,
            w.HTML('<div class="lk-head">2. Who</div>'),
            w.HBox([self.roster_file, self.roster_button]), self.roster_upload, self.roster_note,
            self.section, self.group, self.people, self.staff,
            w.HTML('<div class="lk-head">3. Prepare and start</div>'),
            w.HBox([self.preview_button, self.prelab_button, self.start_button]), self.status, self.preview_out,
        ])
        self.widget.add_class("lk-planner")
        self.refresh_files()

    # -- choices -------------------------------------------------------------------------------------
    def refresh_files(self) -> None:
        """List bench, cart, template and roster files (demo folder and working folder)."""
        benches = self.workspace.files_of_kind("bench")
        carts = self.workspace.files_of_kind("cart")
        templates = self.workspace.files_of_kind("template")
        set_choices(self.bench, [(f.label, str(f.path)) for f in benches])
        set_choices(self.cart, [(NO_CART, "")] + [(f.label, str(f.path)) for f in carts])
        if len(self.cart.options) > 1:
            self.cart.value = self.cart.options[1][1]
        set_choices(self.template, [(f.label, str(f.path)) for f in templates])
        csvs = sorted(p for p in self.workspace.folder.glob("*.csv"))
        set_choices(self.roster_file, [(p.name, str(p)) for p in csvs] or [("(no CSV in the working folder)", "")])

    def load(self) -> bool:
        """Load the chosen bench, cart and template; show every problem found."""
        if not self.bench.value or not self.template.value:
            self.loaded_note.value = message("choose a bench and a template", "problem")
            return False
        try:
            self.loaded = self.workspace.load(Path(self.bench.value), Path(self.cart.value) if self.cart.value
                                              else None, Path(self.template.value))
        except FileValidationError as exc:
            self.loaded = None
            self.loaded_note.value = Safe(message("the files have problems:", "problem")
                                          + lines(str(p) for p in exc.problems))
            return False
        except (LabkitError, OSError) as exc:
            self.loaded = None
            self.loaded_note.value = message(str(exc), "problem")
            return False
        b, t = self.loaded[0].bench, self.loaded[1].template
        cart = b.cart.id if b.cart else "none"
        self.loaded_note.value = message(f"{b.bench.title} (cart {cart}); {t.template.title}, "
                                         f"{len(t.steps)} steps", "ok")
        return True

    # -- roster --------------------------------------------------------------------------------------
    def _roster_uploaded(self, change: dict[str, Any]) -> None:
        files = change["new"]
        if not files:
            return
        item = files[0]
        content = item.get("content", b"")
        data = content.tobytes() if hasattr(content, "tobytes") else bytes(content)
        name = Path(str(item.get("name", "roster.csv"))).name
        safe = "".join(c if c.isalnum() or c in "-_." else "_" for c in name) or "roster.csv"
        if not safe.lower().endswith(".csv"):
            safe += ".csv"
        target = self.workspace.folder / safe
        if target.exists():
            target = target.with_name(f"{target.stem}-uploaded.csv")
        target.write_bytes(data)
        self.refresh_files()
        self.roster_file.value = str(target)
        self.import_roster()

    def import_roster(self) -> bool:
        """Read the chosen roster; fill the section choices."""
        from labkit.session.roster import read_roster

        if not self.roster_file.value:
            self.roster_note.value = message("put a roster CSV in the working folder first", "problem")
            return False
        try:
            self.roster = read_roster(self.roster_file.value)
        except FileValidationError as exc:
            self.roster_note.value = Safe(message("the roster has problems:", "problem")
                                          + lines(str(p) for p in exc.problems))
            return False
        sections = sorted({r["section"] for r in self.roster})
        set_choices(self.section, sections)
        students = sum(1 for r in self.roster if r["role"] == "student")
        self.roster_note.value = message(f"{len(self.roster)} people ({students} students) in sections "
                                         f"{', '.join(sections)}", "ok")
        if sections and not self.section.value:
            self.section.value = sections[0]
        return True

    def _section_changed(self) -> None:
        groups = sorted({r["group"] for r in self.roster if r["section"] == self.section.value and r["group"]})
        set_choices(self.group, groups)
        if groups and self.group.value not in groups:
            self.group.value = groups[0]

    def _group_changed(self) -> None:
        people = [r["participant_id"] for r in self.roster if r["section"] == self.section.value
                  and r["group"] == self.group.value and r["role"] == "student"]
        if people:
            self.people.value = ", ".join(people)
        staff = [r["participant_id"] for r in self.roster if r["section"] == self.section.value
                 and r["role"] in ("ta", "instructor")]
        if staff:
            self.staff.value = staff[0]

    # -- preview and pre-lab -------------------------------------------------------------------------
    def preview_rows(self) -> list[dict[str, Any]]:
        """One row per step reading: predicted value, band and the step's cautions."""
        from labkit.core.cautions import step_cautions
        from labkit.core.network import NetworkError
        from labkit.core.predict import predict_state
        from labkit.core.quantities import quantity
        from labkit.core.state import states_after_steps

        if self.loaded is None and not self.load():
            return []
        assert self.loaded is not None
        bench, template = self.loaded[0].bench, self.loaded[1].template
        states = states_after_steps(bench, template)
        out: list[dict[str, Any]] = []
        total = len(template.steps)
        for i, (step, state) in enumerate(zip(template.steps, states, strict=True)):
            self.progress(i, total, f"predicting step {step.id}")
            try:
                pred = predict_state(bench, state, n_samples=PREVIEW_SAMPLES)
                error = ""
            except NetworkError as exc:
                pred, error = None, str(exc)
            cautions = step_cautions(bench, step, state, pred.rating_flags if pred else [])
            base = {"step": i + 1, "step_id": step.id, "title": step.title, "cautions": cautions, "error": error}
            if not step.readings:
                out.append(base | {"quantity": "", "location": "", "unit": "", "predicted": math.nan,
                                   "band_low": math.nan, "band_high": math.nan, "tolerance": ""})
            for spec in step.readings:
                value = low = high = math.nan
                if pred is not None:
                    with contextlib.suppress(KeyError):
                        value, low, high = pred.reading(spec.location, spec.quantity, spec.sensor)
                out.append(base | {"quantity": spec.quantity, "location": spec.location,
                                   "unit": quantity(spec.quantity).unit, "predicted": value, "band_low": low,
                                   "band_high": high, "tolerance": spec.tolerance})
        self.progress(total, total, "preview ready")
        return out

    def preview(self) -> None:
        """Show the predicted readings of every step with bands and cautions."""
        rows = self.preview_rows()
        if not rows:
            return
        parts: list[str] = []
        by_step: dict[int, list[dict[str, Any]]] = {}
        for r in rows:
            by_step.setdefault(r["step"], []).append(r)
        for step, items in by_step.items():
            first = items[0]
            parts.append(f'<div class="lk-head">Step {step}: {esc(first["title"])} '
                         f'<span class="lk-muted">[{esc(first["step_id"])}]</span></div>')
            parts.append(lines(first["cautions"], "lk-caution"))
            if first["error"]:
                parts.append(message(f"cannot be predicted: {first['error']}", "problem"))
            readings = [r for r in items if r["quantity"]]
            if readings:
                parts.append(table(["reading", "at", "predicted", "band (5-95 %)", "unit", "tolerance"],
                                   [[r["quantity"], r["location"], num(r["predicted"]),
                                     f"{num(r['band_low'])} \u2026 {num(r['band_high'])}", r["unit"],
                                     r["tolerance"]] for r in readings]))
            else:
                parts.append(esc("no readings at this step"))
        from labkit.core.cautions import DEFER

        parts.append(f'<div class="lk-defer">{esc(DEFER)}</div>')
        self.preview_out.value = Safe("".join(parts))

    def export_prelab(self) -> Path | None:
        """Write the pre-lab sheet (the report layer's, when this version has it; else the predictions CSV)."""
        if self.loaded is None and not self.load():
            return None
        assert self.loaded is not None
        from labkit.widgets.reports import framed, safe_file_stem

        tid = self.loaded[1].template.template.id
        try:
            from labkit.report.prelab import prelab_sheet
        except ImportError:  # an older report layer: fall back to the predictions table
            prelab_sheet = None
        if prelab_sheet is not None:
            lb, lt = self.loaded
            try:
                sheet = prelab_sheet(lb.bench, lt.template, bench_text=lb.type_source.text,
                                     template_text=lt.source.text, progress=self.progress)
            except LabkitError as exc:
                self.status.value = message(f"the pre-lab sheet failed: {exc}", "problem")
                return None
            path = sheet.write(self.workspace.reports / f"prelab-{safe_file_stem(tid)}.html")
            self.status.value = Safe(message(f"pre-lab sheet written to {path}", "ok") + framed(sheet.html, 480))
            return path
        import pandas as pd

        rows = self.preview_rows()
        frame = pd.DataFrame([{k: v for k, v in r.items() if k != "cautions"} | {"cautions": " | ".join(
            r["cautions"])} for r in rows])
        path = self.workspace.reports / f"prelab-{safe_file_stem(tid)}.csv"
        frame.to_csv(path, index=False)
        self.status.value = message(f"predictions table written to {path} (the report layer's pre-lab sheet is "
                                    "not in this version)", "ok")
        return path

    # -- start ---------------------------------------------------------------------------------------
    def start(self) -> SessionRunner | None:
        """Create the session in the archive, open it, and hand the runner over."""
        from labkit.session.runner import Actor, SessionError, SessionRunner

        if self.loaded is None and not self.load():
            return None
        assert self.loaded is not None
        people = [p.strip() for p in self.people.value.replace(";", ",").split(",") if p.strip()]
        if not people:
            self.status.value = message("name the people present (participant ids)", "problem")
            return None
        try:
            staff = Actor(self.staff.value.strip(), "ta")
            if self.roster:
                known = {r["participant_id"] for r in self.workspace.archive.roster().to_dict("records")} \
                    if not self.workspace.archive.roster().empty else set()
                self.workspace.archive.add_roster([r for r in self.roster if r["participant_id"] not in known])
            runner = SessionRunner.create(self.workspace.archive, self.loaded[0], self.loaded[1],
                                          section=self.section.value.strip(), group=self.group.value.strip(),
                                          people=people, actor=staff)
            runner.open()
        except (SessionError, LabkitError) as exc:
            self.status.value = message(f"cannot start: {exc}", "problem")
            return None
        runner.actor = Actor(people[0], "student")
        self.status.value = message(f"session {runner.session_id} created and open", "ok")
        self.on_start(runner)
        return runner
