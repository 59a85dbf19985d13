"""The synchronization view of a synchronize step: phase difference in time, slip, beat, windows, advice, data age.

It starts from the step's predicted sides and updates from values entered for the incoming and running
sides (typed with units) and from the step's recorded slip reading. Every figure comes from
:func:`labkit.core.sync.predict_sync`; the clock is the kernel's, so the data's age is shown beside them.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from typing import TYPE_CHECKING

import ipywidgets as w
import numpy as np

from labkit.core.errors import LabkitError
from labkit.widgets.plots import SyncPlot
from labkit.widgets.text import esc, lines, message, num

if TYPE_CHECKING:
    from labkit.core.sync import SyncPrediction
    from labkit.session.runner import StepView


class SyncPanel:
    """Inputs for both sides, the outlook figures and the advice (the supervisor decides on closing).

    Parameters
    ----------
    clock
        Seconds on a monotonic-enough clock (default :func:`time.time`); tests pass a fake one.
    """

    def __init__(self, clock: Callable[[], float] = time.time) -> None:
        self.clock = clock
        self.view: StepView | None = None
        self.v_nominal: float | None = None
        self.prediction: SyncPrediction | None = None
        self.data_time = 0.0
        self.source = "predicted"
        box = w.Layout(width="150px")
        self.fields = {
            "in_v": w.Text(description="incoming V", layout=box, continuous_update=False),
            "in_f": w.Text(description="incoming f", layout=box, continuous_update=False),
            "in_a": w.Text(description="incoming \u2220", layout=box, continuous_update=False),
            "run_v": w.Text(description="running V", layout=box, continuous_update=False),
            "run_f": w.Text(description="running f", layout=box, continuous_update=False),
            "run_a": w.Text(description="running \u2220", layout=box, continuous_update=False),
        }
        for f in self.fields.values():
            f.style.description_width = "72px"
            f.layout.width = "200px"
        self.apply_button = w.Button(description="Use these values",
                                   layout=w.Layout(width="auto"), tooltip="recompute from the values typed")
        self.apply_button.add_class("lk-sync-apply")
        self.apply_button.on_click(lambda _b: self.apply_entered())
        self.refresh_button = w.Button(description="Refresh (age and windows)", layout=w.Layout(width="auto"))
        self.refresh_button.on_click(lambda _b: self.refresh())
        self.status = w.HTML()
        self.figures = w.HTML()
        self.advice = w.HTML()
        self.plot = SyncPlot()
        self.widget = w.VBox([
            w.HTML('<div class="lk-head">Synchronizing</div>'),
            w.HBox([self.fields["in_v"], self.fields["in_f"], self.fields["in_a"]]),
            w.HBox([self.fields["run_v"], self.fields["run_f"], self.fields["run_a"]]),
            w.HBox([self.apply_button, self.refresh_button]), self.status, self.figures, self.plot.figure,
            self.advice,
        ])
        self.widget.add_class("lk-syncpanel")

    def set_view(self, view: StepView, v_nominal: float | None = None) -> None:
        """Start from the step's prediction (both sides as predicted just before closing).

        ``v_nominal`` is the bench's nominal voltage (V), the base of limit sets on a nominal base.
        """
        self.view = view
        self.v_nominal = v_nominal
        self.prediction = view.sync
        if view.sync is None:
            self.status.value = message("no synchronizing prediction for this step: "
                                        + "; ".join(view.warnings or ["a side is not energized"]), "problem")
            return
        s = view.sync
        for key, value in (("in_v", f"{s.incoming.v_rms:.4g} V"), ("in_f", f"{s.incoming.frequency_hz:.5g} Hz"),
                           ("in_a", f"{s.incoming.angle_deg:.3g} deg"), ("run_v", f"{s.running.v_rms:.4g} V"),
                           ("run_f", f"{s.running.frequency_hz:.5g} Hz"),
                           ("run_a", f"{s.running.angle_deg:.3g} deg")):
            self.fields[key].value = value
        self.data_time = self.clock()
        self.source = "predicted"
        self._recompute()

    def _side(self, prefix: str) -> tuple[float, float, float]:
        from labkit.core.units import parse_quantity

        v = parse_quantity(self.fields[f"{prefix}_v"].value, "voltage")
        f = parse_quantity(self.fields[f"{prefix}_f"].value, "frequency")
        text = self.fields[f"{prefix}_a"].value.strip() or "0 deg"
        sign = -1.0 if text.startswith("-") else 1.0  # the units layer takes magnitudes; angles carry a sign
        a = sign * parse_quantity(text.lstrip("+-").strip(), "angle")
        return v, f, a

    def apply_entered(self) -> None:
        """Recompute from the typed values; their time stamp is now."""
        try:
            self._sides = (self._side("in"), self._side("run"))
        except LabkitError as exc:
            self.status.value = message(f"cannot use these values: {exc}", "problem")
            return
        self.data_time = self.clock()
        self.source = "entered"
        self._recompute(self._sides)

    def apply_slip(self, slip_hz: float) -> None:
        """Take a recorded slip reading: incoming frequency = running frequency + slip (incoming minus running)."""
        if self.prediction is None:
            return
        run_f = self.prediction.running.frequency_hz
        self.fields["in_f"].value = f"{run_f + slip_hz:.6g} Hz"
        self.apply_entered()
        self.source = "recorded slip reading"

    def refresh(self) -> None:
        """Recompute at the present time (the data grow older; windows move)."""
        if self.prediction is not None:
            self._recompute(getattr(self, "_sides", None))

    def _recompute(self, sides: tuple | None = None) -> None:
        from labkit.core.sync import SideState, predict_sync, voltage_across_envelope

        if self.view is None or self.view.sync is None:
            return
        base = self.view.sync
        if sides is None:
            incoming, running = base.incoming, base.running
        else:
            try:
                incoming, running = SideState(*sides[0]), SideState(*sides[1])
            except LabkitError as exc:
                self.status.value = message(str(exc), "problem")
                return
        now = self.clock()
        try:
            p = predict_sync(incoming, running, base.limits, data_time_s=self.data_time, now_s=now,
                             closing_time_s=base.closing_time_s, v_nominal=self.v_nominal,
                             incoming_name=getattr(self.view.step, "source", "the incoming set"))
        except LabkitError as exc:
            self.status.value = message(str(exc), "problem")
            return
        self.prediction = p
        beat = p.beat_period_s
        horizon = min(3.0 * beat, 60.0) if math.isfinite(beat) and beat > 0 else 10.0
        t = np.linspace(0.0, horizon, 600)
        dphi = p.phase_trajectory(now + t)
        env = voltage_across_envelope(now + t, incoming, running, data_time_s=self.data_time)
        windows = [(float(a) - now, float(b) - now) for a, b in zip(p.window_command_start_s, p.window_command_end_s,
                                                                    strict=True)]
        self.plot.show(t, dphi, p.limits.max_dphi_deg, env, windows)
        age = p.data_age_s
        win_text = "; ".join(f"command between {a:+.2f} s and {b:+.2f} s" for a, b in windows[:3]) or \
            "none within the look-ahead (slip or voltage outside the limits, or the phase is not coming round)"
        rows = [
            ("slip (incoming minus running)", f"{num(p.slip_hz, 4)} Hz"),
            ("beat period", "none (no slip)" if not math.isfinite(beat) else f"{num(beat, 4)} s"),
            ("voltage difference", f"{100 * p.dv_running:+.2f} % of running"),
            ("phase difference now", f"{p.dphi_now_deg:+.1f} deg"),
            ("phase difference at contact touch", f"{p.dphi_at_touch_deg:+.1f} deg (closing time "
                                                  f"{1000 * p.closing_time_s:.0f} ms)"),
            ("if closed now", p.verdict_if_closed_now.text),
            ("closing windows", win_text),
            ("limits", p.limits.title),
            ("data", f"{self.source}, {age:.1f} s old at {time.strftime('%H:%M:%S', time.localtime(now))}"),
        ]
        body = "".join(f"<tr><th>{esc(k)}</th><td>{esc(v)}</td></tr>" for k, v in rows)
        self.figures.value = f'<table class="lk-table lk-syncfigs">{body}</table>'
        self.advice.value = ('<div class="lk-head">Trim advice</div>' + lines(p.advice)
                             + '<div class="lk-muted">The supervisor decides whether and when to close.</div>')
        self.status.value = ""
