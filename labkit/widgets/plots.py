"""bqplot figures of captures and synchronization: decimated waveforms, phasors, per-cycle trends, sync outlook.

bqplot draws SVG, and a trace of hundreds of thousands of segments freezes the browser, so waveforms
are decimated in the kernel to a min/max envelope per pixel column (:func:`envelope_xy`, a few thousand
points per trace) and re-decimated over the visible range when the user zooms. Series are told apart by
dash style and legend label as well as colour.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import bqplot as bq
import ipywidgets as w
import numpy as np
from numpy.typing import NDArray

from labkit.report.svg import minmax_envelope

COLUMNS = 1200
"""Pixel columns of a waveform trace: each gives a min and a max point (2400 points per trace)."""
COLORS = ("#1f4e8c", "#a4161a", "#0b6e4f", "#7a5200", "#5b2a86", "#0f6f74")
DASHES = ("solid", "dashed", "dotted", "dash_dotted")


def envelope_xy(t: NDArray[np.float64], y: NDArray[np.float64], columns: int = COLUMNS
                ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """A trace decimated to ``2 * columns`` points (min then max of each column) that keeps its look.

    Parameters
    ----------
    t
        Sample times, s (increasing).
    y
        Samples.
    columns
        Pixel columns.
    """
    t = np.asarray(t, dtype=float)
    y = np.asarray(y, dtype=float)
    if y.size <= 2 * columns:
        return t.copy(), y.copy()
    lo, hi, starts = minmax_envelope(y, columns)
    tx = t[starts]
    return np.repeat(tx, 2), np.column_stack([lo, hi]).ravel()


def _fig(marks: list, axes: list, title: str, height: str = "260px", cls: str = "") -> bq.Figure:
    fig = bq.Figure(marks=marks, axes=axes, title=title, legend_location="top-right",
                    fig_margin={"top": 40, "bottom": 45, "left": 60, "right": 20},
                    layout=w.Layout(width="100%", height=height))
    if cls:
        fig.add_class(cls)
    return fig


class WaveformPlot:
    """Waveforms of a capture, one trace per channel, decimated; re-decimated when zoomed (pan/zoom in x)."""

    def __init__(self) -> None:
        self.sx = bq.LinearScale()
        self.sy = bq.LinearScale()
        self.lines = bq.Lines(x=[], y=[], scales={"x": self.sx, "y": self.sy}, display_legend=True, labels=[])
        self.figure = _fig([self.lines], [bq.Axis(scale=self.sx, label="time (s)"),
                                          bq.Axis(scale=self.sy, side="left", label="value (V or A)")],
                           "waveforms (decimated for display)", cls="lk-wave")
        self.figure.interaction = bq.interacts.PanZoom(scales={"x": [self.sx]})
        self._t: NDArray[np.float64] = np.empty(0)
        self._y: NDArray[np.float64] = np.empty((0, 0))
        self.sx.observe(self._zoomed, names=["min", "max"])

    def show(self, t: NDArray[np.float64], data: NDArray[np.float64], names: Sequence[str],
             units: Sequence[str]) -> None:
        """Plot channels ``data`` (channels, samples) against ``t`` (s)."""
        self._t, self._y = np.asarray(t, dtype=float), np.atleast_2d(np.asarray(data, dtype=float))
        self._names = [f"{n} ({u})" if u else n for n, u in zip(names, list(units) + [""] * len(names),
                                                                     strict=False)]
        with self.sx.hold_trait_notifications():
            self.sx.min, self.sx.max = None, None
        self._draw(0, self._t.size)

    def _zoomed(self, _change: object) -> None:
        if self._t.size == 0 or self.sx.min is None or self.sx.max is None:
            return
        i0, i1 = np.searchsorted(self._t, [self.sx.min, self.sx.max])
        self._draw(max(int(i0) - 1, 0), min(int(i1) + 1, self._t.size))

    def _draw(self, i0: int, i1: int) -> None:
        xs, ys = [], []
        for row in self._y:
            x, y = envelope_xy(self._t[i0:i1], row[i0:i1])
            xs.append(x)
            ys.append(y)
        n = max((len(x) for x in xs), default=0)
        # equal lengths so bqplot takes a 2-D array; pad by repeating the last point (draws nothing new)
        pad = [np.pad(a, (0, n - len(a)), mode="edge") if len(a) else np.zeros(n) for a in xs]
        pady = [np.pad(a, (0, n - len(a)), mode="edge") if len(a) else np.zeros(n) for a in ys]
        with self.lines.hold_sync():
            self.lines.x = np.array(pad)
            self.lines.y = np.array(pady)
            self.lines.labels = list(self._names)
            self.lines.colors = list(COLORS[: len(pad)])
            self.lines.line_style = "solid"

    @property
    def points_per_trace(self) -> int:
        """Points sent per trace now."""
        y = np.asarray(self.lines.y)
        return int(y.shape[-1]) if y.size else 0


class PhasorPlot:
    """Fundamental phasors of a capture: voltages solid, currents dashed, each kind on its own scale."""

    def __init__(self) -> None:
        self.sx = bq.LinearScale(min=-1.3, max=1.3)
        self.sy = bq.LinearScale(min=-1.3, max=1.3)
        self.ring = bq.Lines(x=np.cos(np.linspace(0, 2 * np.pi, 73)), y=np.sin(np.linspace(0, 2 * np.pi, 73)),
                             scales={"x": self.sx, "y": self.sy}, colors=["#c9ced6"])
        self.voltages = bq.Lines(x=[], y=[], scales={"x": self.sx, "y": self.sy}, colors=[COLORS[0]],
                                 line_style="solid", stroke_width=2.5)
        self.currents = bq.Lines(x=[], y=[], scales={"x": self.sx, "y": self.sy}, colors=[COLORS[1]],
                                 line_style="dashed", stroke_width=2.5)
        self.labels = bq.Label(x=[], y=[], text=[], scales={"x": self.sx, "y": self.sy}, font_weight="normal",
                               default_size=12)
        self.figure = _fig([self.ring, self.voltages, self.currents, self.labels], [],
                           "phasors (fundamental; voltages solid, currents dashed)", height="300px", cls="lk-phasor")
        self.figure.layout.width = "320px"
        self.tips: list[tuple[str, float, float]] = []

    def show(self, names: Sequence[str], kinds: Sequence[str], phasors: Sequence[complex]) -> None:
        """Draw phasors (complex RMS), angles relative to the first voltage channel (counter-clockwise)."""
        ph = np.asarray(phasors, dtype=complex)
        ref_index = next((k for k, kind in enumerate(kinds) if kind != "current"), 0)
        ref = ph[ref_index]
        rot = np.exp(-1j * np.angle(ref)) if abs(ref) > 0 else 1.0
        ph = ph * rot
        self.tips = []
        segs = {"voltage": ([], []), "current": ([], [])}
        lx, ly, lt = [], [], []
        for kind in ("voltage", "current"):
            idx = [k for k, kd in enumerate(kinds) if (kd == "current") == (kind == "current")]
            top = max((abs(ph[k]) for k in idx), default=0.0)
            for k in idx:
                z = ph[k] / top if top > 0 else 0j
                segs[kind][0].append([0.0, z.real])
                segs[kind][1].append([0.0, z.imag])
                angle = math.degrees(np.angle(ph[k])) if abs(ph[k]) > 0 else 0.0
                unit = "A" if kind == "current" else "V"
                self.tips.append((names[k], abs(ph[k]), angle))
                lx.append(1.12 * z.real)
                ly.append(1.12 * z.imag)
                lt.append(f"{names[k]} {abs(ph[k]):.3g} {unit} \u2220{angle:.1f}\u00b0")
        for mark, kind in ((self.voltages, "voltage"), (self.currents, "current")):
            x, y = segs[kind]
            with mark.hold_sync():
                mark.x = np.array(x) if x else []
                mark.y = np.array(y) if y else []
        with self.labels.hold_sync():
            self.labels.x, self.labels.y, self.labels.text = lx, ly, lt


class TrendPlot:
    """Per-cycle trends of a capture: each channel's RMS in % of its mean, and the frequency."""

    def __init__(self) -> None:
        self.sx = bq.LinearScale()
        self.sy = bq.LinearScale()
        self.sf = bq.LinearScale()
        self.rms = bq.Lines(x=[], y=[], scales={"x": self.sx, "y": self.sy}, display_legend=True, marker="circle",
                            marker_size=12)
        self.freq = bq.Lines(x=[], y=[], scales={"x": self.sx, "y": self.sf}, colors=["#5c6370"],
                             line_style="dashed", marker="square", marker_size=12, display_legend=True,
                             labels=["frequency (Hz)"])
        self.figure = _fig([self.rms, self.freq],
                           [bq.Axis(scale=self.sx, label="time (s)"),
                            bq.Axis(scale=self.sy, side="left", label="RMS (% of mean)"),
                            bq.Axis(scale=self.sf, side="right", label="Hz")],
                           "per-cycle trends", height="230px", cls="lk-trend")

    def show(self, times: NDArray[np.float64], cycle_rms: NDArray[np.float64], cycle_frequency: NDArray[np.float64],
             names: Sequence[str]) -> None:
        """Plot per-cycle RMS (channels, cycles) and frequency (cycles) at cycle centre times (s)."""
        t = np.asarray(times, dtype=float)
        r = np.atleast_2d(np.asarray(cycle_rms, dtype=float))
        mean = np.nanmean(r, axis=1, keepdims=True)
        pct = np.where(mean != 0, 100.0 * r / np.where(mean == 0, 1.0, mean), np.nan)
        with self.rms.hold_sync():
            self.rms.x = t
            self.rms.y = pct
            self.rms.labels = list(names)
            self.rms.colors = list(COLORS[: len(pct)])
        with self.freq.hold_sync():
            self.freq.x = t
            self.freq.y = np.asarray(cycle_frequency, dtype=float)


class SyncPlot:
    """Phase difference (incoming minus running) extrapolated ahead, with the limit band and the beat envelope."""

    def __init__(self) -> None:
        self.sx = bq.LinearScale()
        self.sp = bq.LinearScale(min=-180.0, max=180.0)
        self.sv = bq.LinearScale(min=0.0)
        self.phase = bq.Lines(x=[], y=[], scales={"x": self.sx, "y": self.sp}, colors=[COLORS[0]],
                              labels=["phase difference (deg)"], display_legend=True, stroke_width=2)
        self.band = bq.Lines(x=[], y=[], scales={"x": self.sx, "y": self.sp}, colors=[COLORS[2], COLORS[2]],
                             line_style="dashed", labels=["+ limit", "- limit"], display_legend=True)
        self.windows = bq.Lines(x=[], y=[], scales={"x": self.sx, "y": self.sp}, colors=[COLORS[2]],
                                stroke_width=8, opacities=[0.5], labels=["closing window (command)"],
                                display_legend=True)
        self.envelope = bq.Lines(x=[], y=[], scales={"x": self.sx, "y": self.sv}, colors=[COLORS[1]],
                                 line_style="dotted", labels=["voltage across switch, peak (V)"],
                                 display_legend=True)
        self.figure = _fig([self.phase, self.band, self.windows, self.envelope],
                           [bq.Axis(scale=self.sx, label="seconds from now"),
                            bq.Axis(scale=self.sp, side="left", label="phase difference (deg)"),
                            bq.Axis(scale=self.sv, side="right", label="V peak")],
                           "synchronizing outlook (extrapolated from the data)", height="280px", cls="lk-sync")

    def show(self, t_ahead: NDArray[np.float64], dphi: NDArray[np.float64], limit_deg: float,
             envelope_v: NDArray[np.float64], windows: Sequence[tuple[float, float]]) -> None:
        """Plot the extrapolated phase difference (deg) and envelope (V) at ``t_ahead`` (s from now)."""
        t = np.asarray(t_ahead, dtype=float)
        # break the line where the angle wraps, so a jump from +180 to -180 is not drawn as a stroke
        y = np.asarray(dphi, dtype=float).copy()
        jumps = np.abs(np.diff(y)) > 180.0
        y[1:][jumps] = np.nan
        with self.phase.hold_sync():
            self.phase.x, self.phase.y = t, y
        with self.band.hold_sync():
            self.band.x = np.array([[t[0], t[-1]], [t[0], t[-1]]])
            self.band.y = np.array([[limit_deg, limit_deg], [-limit_deg, -limit_deg]])
        wx = [[a, b] for a, b in windows] or [[t[0], t[0]]]
        with self.windows.hold_sync():
            self.windows.x = np.array(wx)
            self.windows.y = np.zeros((len(wx), 2))
        with self.envelope.hold_sync():
            self.envelope.x, self.envelope.y = t, np.asarray(envelope_v, dtype=float)
