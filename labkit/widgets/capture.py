"""The capture panel: upload a file (size limit shown first), pick one from ``captures/``, or take one.

"Take capture" asks the step's source: the simulated bench (synthesized from the step's prediction,
seeded) or a live :class:`~labkit.captures.sources.CaptureSource`. The capture is drawn (waveforms
decimated, phasors, per-cycle trends) and a reading of the step can be taken from it.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import ipywidgets as w
import numpy as np

from labkit.core.errors import LabkitError
from labkit.lab.limits import describe_bytes, upload_limit
from labkit.widgets.plots import PhasorPlot, TrendPlot, WaveformPlot
from labkit.widgets.text import esc, message, num, set_choices

if TYPE_CHECKING:
    from labkit.captures.capture import Capture
    from labkit.captures.sources import CaptureSource
    from labkit.core.waveform import WaveformAnalysis
    from labkit.session.readings import ParsedReading
    from labkit.session.runner import SessionRunner
    from labkit.widgets.workspace import Workspace

ACCEPT = ".csv,.txt,.npz,.wav,.cfg"


class CapturePanel:
    """Capture import and display for the current step.

    Parameters
    ----------
    workspace
        The working folder (uploads are kept in its ``captures/``).
    on_reading
        Called with a parsed reading taken from a capture (the runner view records it).
    live_source
        A live capture source; ``None`` uses the simulated bench.
    """

    def __init__(self, workspace: Workspace, on_reading: Callable[[ParsedReading], None],
                 live_source: CaptureSource | None = None, limit_bytes: int | None = None) -> None:
        self.workspace = workspace
        self.on_reading = on_reading
        self.live_source = live_source
        self.limit = upload_limit() if limit_bytes is None else int(limit_bytes)
        self.runner: SessionRunner | None = None
        self.capture: Capture | None = None
        self.analysis: WaveformAnalysis | None = None
        self.capture_name = ""

        self.limit_note = w.HTML(esc(f"Upload limit: {describe_bytes(self.limit)} per file. Larger files: copy them "
                                     f"into {workspace.captures} and pick them below."))
        self.status = w.HTML()
        self.upload = w.FileUpload(accept=ACCEPT, multiple=False, description="Upload capture file",
                                   icon="", layout=w.Layout(width="auto"))
        self.upload.add_class("lk-upload")
        self.upload.observe(self._uploaded, names="value")
        self.pick = w.Dropdown(description="From folder", options=[], layout=w.Layout(width="420px"))
        self.pick_button = w.Button(description="Open picked file",
                                   layout=w.Layout(width="auto"), tooltip="read the file chosen in the list")
        self.pick_button.on_click(lambda _b: self.open_picked())
        self.refresh_button = w.Button(description="Refresh list", layout=w.Layout(width="auto"))
        self.refresh_button.on_click(lambda _b: self.refresh_files())
        source_name = "live source" if live_source is not None else "simulated bench"
        self.take_button = w.Button(description=f"Take capture ({source_name})", layout=w.Layout(width="auto"),
                                    tooltip="acquire one capture for the chosen reading")
        self.take_button.add_class("lk-take")
        self.take_button.on_click(lambda _b: self.take())
        self.target = w.Dropdown(description="For reading", options=[], layout=w.Layout(width="420px"))
        self.use_button = w.Button(description="Record from capture",
                                   layout=w.Layout(width="auto"), tooltip="record the chosen reading's value "
                                   "as the capture gives it")
        self.use_button.add_class("lk-use-capture")
        self.use_button.on_click(lambda _b: self.use())
        self.summary = w.HTML()
        self.waves = WaveformPlot()
        self.phasors = PhasorPlot()
        self.trends = TrendPlot()
        self.widget = w.VBox([
            w.HTML('<div class="lk-head">Capture</div>'), self.limit_note,
            w.HBox([self.upload]), w.HBox([self.pick, self.pick_button, self.refresh_button]),
            w.HBox([self.target, self.take_button, self.use_button]), self.status, self.summary,
            self.waves.figure, w.HBox([self.phasors.figure, self.trends.figure]),
        ])
        self.widget.add_class("lk-capture")
        self.refresh_files()

    # -- choices -------------------------------------------------------------------------------------
    def refresh_files(self) -> None:
        """List the capture files of the working folder."""
        files = self.workspace.capture_files()
        set_choices(self.pick, [(f.label, str(f.path)) for f in files] or [("(no capture files yet)", "")])

    def set_runner(self, runner: SessionRunner | None) -> None:
        """Follow a runner's current step (its readings become the capture targets)."""
        self.runner = runner
        if runner is None:
            set_choices(self.target, [])
            return
        view = runner.view()
        set_choices(self.target, [(f"{r.quantity} at {r.location}", j) for j, r in enumerate(view.step.readings)])

    # -- sources -------------------------------------------------------------------------------------
    def _uploaded(self, change: dict[str, Any]) -> None:
        files = change["new"]
        if not files:
            return
        item = files[0]
        name = str(item.get("name", "upload"))
        size = int(item.get("size", 0) or 0)
        content = item.get("content", b"")
        data = content.tobytes() if hasattr(content, "tobytes") else bytes(content)
        size = max(size, len(data))
        if size > self.limit:
            self.status.value = message(f'"{name}" is {describe_bytes(size)}, above the upload limit of '
                                        f"{describe_bytes(self.limit)}. Copy it into {self.workspace.captures} "
                                        "and pick it from the list instead.", "problem")
            self._clear_upload()
            return
        try:
            path = self.workspace.save_upload(name, data)
        except (LabkitError, OSError) as exc:
            self.status.value = message(str(exc), "problem")
            self._clear_upload()
            return
        self._clear_upload()
        self.refresh_files()
        self.pick.value = str(path)
        self.open_path(path)

    def _clear_upload(self) -> None:
        # drop the bytes from the widget state so a large file is not kept twice
        self.upload.unobserve(self._uploaded, names="value")
        try:
            self.upload.value = ()
        finally:
            self.upload.observe(self._uploaded, names="value")

    def open_picked(self) -> None:
        """Read the file chosen in the list."""
        from pathlib import Path

        if not self.pick.value:
            self.status.value = message("no capture file chosen", "problem")
            return
        self.open_path(Path(self.pick.value))

    def open_path(self, path: Any) -> None:
        """Read and show a capture file."""
        from labkit.captures.capture import read_capture

        try:
            cap = read_capture(path)
        except (LabkitError, OSError, ValueError) as exc:
            self.status.value = message(f"cannot read {path}: {exc}", "problem")
            return
        self.show(cap, str(getattr(path, "name", path)))

    def take(self) -> None:
        """Acquire a capture for the chosen reading: the live source, else the simulated bench."""
        if self.live_source is not None:
            try:
                cap = next(iter(self.live_source))
            except (LabkitError, OSError, StopIteration) as exc:
                self.status.value = message(f"the live source gave no capture: {exc}", "problem")
                return
            self.show(cap, f"live capture ({cap.source})")
            return
        if self.runner is None or self.target.value is None:
            self.status.value = message("start a session first: the simulated bench follows its step", "problem")
            return
        from labkit.session.readings import simulated_capture

        view = self.runner.view()
        if view.prediction is None:
            self.status.value = message(f"this step has no prediction to simulate from: {view.error}", "problem")
            return
        spec = view.step.readings[int(self.target.value)]
        self._takes = getattr(self, "_takes", 0) + 1
        seed = self.runner.seed * 1000 + view.index * 37 + int(self.target.value) + 7919 * self._takes
        try:
            cap = simulated_capture(view.prediction, self.runner.bench, spec, seed=seed)
        except LabkitError as exc:
            self.status.value = message(f"the simulated bench cannot capture {spec.quantity} at {spec.location}: "
                                        f"{exc}", "problem")
            return
        self.show(cap, f"simulated bench, {spec.quantity} at {spec.location}")

    # -- display -------------------------------------------------------------------------------------
    def show(self, cap: Capture, name: str) -> None:
        """Analyse and draw a capture."""
        from labkit.session.readings import analyse_for

        self.capture, self.capture_name = cap, name
        try:
            self.analysis = analyse_for(cap)
        except (LabkitError, ValueError, IndexError) as exc:
            self.analysis = None
            self.status.value = message(f"{name}: the capture cannot be analysed: {exc}", "problem")
        t = cap.t0 + np.arange(cap.data.shape[1]) / cap.sample_rate
        self.waves.show(t, cap.data, cap.channels, cap.units)
        if self.analysis is None:
            return
        a = self.analysis
        kinds = list(cap.kinds) if cap.kinds else ["voltage"] * len(cap.channels)
        self.phasors.show(list(cap.channels), kinds, [complex(x) for x in a.phasors[:, 0]])
        self.trends.show(a.cycle_times, a.cycle_rms, a.cycle_frequency, list(cap.channels))
        rows = [f"{esc(n)}: RMS {esc(num(float(r)))} {esc(u)}" for n, r, u in
                zip(cap.channels, a.rms, list(cap.units) + [""] * len(cap.channels), strict=False)]
        warn = "".join(f"<div>warning: {esc(getattr(x, 'message', x))}</div>" for x in a.warnings)
        self.summary.value = (f"<div><b>{esc(name)}</b>: {cap.data.shape[1]:,} samples at "
                              f"{esc(num(cap.sample_rate))} Hz, {a.cycles} cycles, "
                              f"{esc(num(a.frequency, 6))} Hz</div><div>{'; '.join(rows)}</div>{warn}")
        self.status.value = message(f"capture ready: {name} ({self.waves.points_per_trace:,} points per trace "
                                    "shown)", "ok")

    def use(self) -> ParsedReading | None:
        """Take the chosen reading from the shown capture and hand it to the runner view."""
        if self.runner is None or self.capture is None or self.target.value is None:
            self.status.value = message("take or open a capture and start a session first", "problem")
            return None
        obtained = "simulated" if self.capture.source == "simulated" else "capture"
        try:
            parsed = self.runner.from_capture(int(self.target.value), self.capture, obtained=obtained)
        except (LabkitError, ValueError, IndexError) as exc:
            self.status.value = message(f"this capture does not give the reading: {exc}", "problem")
            return None
        if not math.isfinite(parsed.value):
            self.status.value = message("the capture gives no finite value for this reading", "problem")
            return None
        self.on_reading(parsed)
        return parsed
