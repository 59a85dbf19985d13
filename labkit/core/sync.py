"""Synchronizing an incoming set to the running grid: slip, beat, voltage across the switch, windows, verdicts.

Sign convention (:mod:`labkit.core.conventions`): every difference is *incoming
minus running*. Slip ``f_in - f_run`` (Hz), phase difference ``angle_in -
angle_run`` (deg, wrapped to (-180, 180]); the voltage difference is a fraction
of a *base* that each limit set names (:attr:`SyncLimitSet.voltage_base`):

* ``bench``: the bench file's ``sync_limits``; base = running-side voltage, as
  the registered quantity ``dv_sync`` is defined, symmetric window.
* ``ieee1547``: IEEE 1547-2018 Table 5 (synchronization parameter limits, by
  aggregate DER rating); base = nominal voltage, ``|V_in - V_run| / V_nom``.
* ``generator_practice``: IEEE C50.12 / C50.13 synchronizing limits as
  transcribed in the field reference (section 1.2); base = running (system)
  voltage, and the voltage window is ASYMMETRIC: the incoming side may be up to
  5 % above the running side but never below it.

Phasor model of each side (RMS phasors): ``v(t) = sqrt(2) * V * cos(2*pi*f*(t - t_data) + angle)``,
so the phase difference moves as ``dphi(t) = dphi0 + 360 * slip * (t - t_data)``.

Verdicts say "within the configured limits" or "outside the configured limits
(...)"; they never call a close safe: the supervisor decides.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.signal import hilbert

from labkit.core.bench import SyncLimits
from labkit.core.conventions import sync_difference, wrap_deg
from labkit.core.errors import ModelInputError, UnknownNameError, did_you_mean

LIMIT_SET_NAMES = ("bench", "ieee1547", "generator_practice")

CAUTION = ("Closing out of phase can damage the machines, their couplings and the line. Follow the lab's own "
           "procedure and local rules; the supervisor decides whether and when to close.")

# Boundaries are inclusive; this relative allowance only absorbs the binary representation of decimal entries
# (60.3 - 60.0 = 0.29999999999999716), it does not widen a limit (0.3001 Hz still fails a 0.3 Hz limit).
_BOUNDARY_RTOL = 1e-9


# -- limit sets -----------------------------------------------------------------------------------
@dataclass(frozen=True)
class SyncLimitSet:
    """One set of synchronization limits (incoming minus running; boundaries inclusive).

    Attributes
    ----------
    name
        ``bench``, ``ieee1547`` or ``generator_practice``.
    title
        Short human-readable title with its row or variant.
    source
        Where the values come from.
    max_slip_hz
        Largest admissible ``|f_in - f_run|`` (Hz).
    dv_min, dv_max
        Admissible voltage difference ``(V_in - V_run) / base`` as fractions (``-0.05``, ``0.05``).
    voltage_base
        ``"running"``: the running-side RMS voltage; ``"nominal"``: the nominal voltage of the bench/system.
    max_dphi_deg
        Largest admissible ``|angle_in - angle_run|`` (deg).
    note
        Anything a reader of the verdict must know about the set.
    """

    name: str
    title: str
    source: str
    max_slip_hz: float
    dv_min: float
    dv_max: float
    voltage_base: Literal["running", "nominal"]
    max_dphi_deg: float
    note: str = ""

    def as_dict(self) -> dict[str, object]:
        """JSON-ready description, with the voltage window in percent."""
        return {
            "name": self.name,
            "title": self.title,
            "source": self.source,
            "max_slip_hz": self.max_slip_hz,
            "dv_min_pct": 100.0 * self.dv_min,
            "dv_max_pct": 100.0 * self.dv_max,
            "voltage_base": self.voltage_base,
            "max_dphi_deg": self.max_dphi_deg,
            "note": self.note,
        }

    def describe(self) -> str:
        """One line: slip, voltage window with its base, angle."""
        return (f"{self.title}: |slip| <= {self.max_slip_hz:g} Hz, dV {100 * self.dv_min:+g} .. "
                f"{100 * self.dv_max:+g} % of the {self.voltage_base} voltage, |dphi| <= {self.max_dphi_deg:g} deg")


# IEEE 1547-2018 Table 5 "Synchronization parameter limits for synchronous interconnection to an EPS, or an
# energized local EPS to an energized Area EPS": (upper rating bound kVA, slip Hz, dV fraction, dphi deg).
IEEE1547_TABLE5: tuple[tuple[float, float, float, float], ...] = (
    (500.0, 0.3, 0.10, 20.0),
    (1500.0, 0.2, 0.05, 15.0),
    (math.inf, 0.1, 0.03, 10.0),
)
_IEEE1547_ROWS = ("0-500 kVA", ">500-1500 kVA", ">1500 kVA")


def ieee1547_limits(rating_kva: float) -> SyncLimitSet:
    """The IEEE 1547-2018 Table 5 row for an aggregate DER rating.

    Parameters
    ----------
    rating_kva
        Aggregate rating of the DER units (kVA), > 0. Rows: 0-500, >500-1500, >1500 kVA (the 2003 edition's
        wording of the last row was >1500-10000 kVA).

    Returns
    -------
    SyncLimitSet
        Voltage base: nominal voltage (``|V_in - V_run| / V_nom``), symmetric window.
    """
    if not (isinstance(rating_kva, int | float) and math.isfinite(rating_kva) and rating_kva > 0):
        msg = f"rating_kva: expected a positive aggregate rating in kVA, found {rating_kva!r}"
        raise ModelInputError(msg)
    for (upper, slip, dv, dphi), row in zip(IEEE1547_TABLE5, _IEEE1547_ROWS, strict=True):
        if rating_kva <= upper:
            return SyncLimitSet(
                name="ieee1547",
                title=f"IEEE 1547-2018 Table 5, {row}",
                source="IEEE 1547-2018 Table 5, synchronization parameter limits (by aggregate DER rating)",
                max_slip_hz=slip,
                dv_min=-dv,
                dv_max=dv,
                voltage_base="nominal",
                max_dphi_deg=dphi,
                note="dV is |V_in - V_run| as a percentage of the nominal voltage",
            )
    raise AssertionError  # pragma: no cover - the last row has no upper bound


def generator_practice_limits() -> SyncLimitSet:
    """Generator synchronizing limits of IEEE C50.12 / C50.13 (as transcribed; field reference section 1.2).

    Slip +-0.067 Hz, closing angle +-10 deg, and an asymmetric voltage window: the incoming (generator) side
    0 .. +5 % of the running (system) side, never below it.
    """
    return SyncLimitSet(
        name="generator_practice",
        title="generator practice (IEEE C50.12/C50.13)",
        source="IEEE C50.12 / C50.13 synchronizing limits, as transcribed in a secondary source",
        max_slip_hz=0.067,
        dv_min=0.0,
        dv_max=0.05,
        voltage_base="running",
        max_dphi_deg=10.0,
        note="asymmetric voltage window: the incoming side may be up to 5 % above the running side, never below",
    )


def bench_limits(sync_limits: SyncLimits | None, bench_id: str = "this bench") -> SyncLimitSet:
    """The bench file's own ``sync_limits`` (absolute values, symmetric; dV over the running-side voltage)."""
    if sync_limits is None:
        msg = (f"{bench_id} has no [bench].sync_limits: the 'bench' limit set is not available; "
               "choose ieee1547 (with a rating) or generator_practice")
        raise ModelInputError(msg)
    return SyncLimitSet(
        name="bench",
        title=f"bench limits of {bench_id}",
        source=f"[bench].sync_limits of {bench_id}",
        max_slip_hz=float(sync_limits.max_slip),
        dv_min=-float(sync_limits.max_voltage_difference),
        dv_max=float(sync_limits.max_voltage_difference),
        voltage_base="running",
        max_dphi_deg=float(sync_limits.max_phase_difference),
        note="dV is (V_in - V_run) over the running-side voltage",
    )


def limit_set(name: str, *, sync_limits: SyncLimits | None = None, bench_id: str = "this bench",
              rating_kva: float | None = None) -> SyncLimitSet:
    """Build a limit set by name (``bench``, ``ieee1547``, ``generator_practice``).

    ``ieee1547`` needs ``rating_kva``; ``bench`` needs the bench's ``sync_limits``.
    """
    if name == "bench":
        return bench_limits(sync_limits, bench_id)
    if name == "ieee1547":
        if rating_kva is None:
            msg = "the ieee1547 limit set needs the aggregate rating in kVA (rating_kva) to pick its Table 5 row"
            raise ModelInputError(msg)
        return ieee1547_limits(rating_kva)
    if name == "generator_practice":
        return generator_practice_limits()
    msg = f'unknown limit set "{name}"{did_you_mean(name, LIMIT_SET_NAMES)}; expected one of {LIMIT_SET_NAMES}'
    raise UnknownNameError(msg)


# -- elementary relations (vectorized) --------------------------------------------------------------
def slip_hz(f_incoming_hz: ArrayLike, f_running_hz: ArrayLike) -> NDArray[np.float64]:
    """Slip frequency, incoming minus running (Hz)."""
    return sync_difference(f_incoming_hz, f_running_hz)


def beat_period_s(slip: ArrayLike) -> NDArray[np.float64]:
    """Beat period ``1 / |slip|`` (s); ``inf`` at zero slip."""
    s = np.abs(np.asarray(slip, dtype=float))
    with np.errstate(divide="ignore"):
        return np.where(s > 0.0, 1.0 / np.where(s > 0.0, s, 1.0), np.inf)


def advance_angle_deg(slip: ArrayLike, closing_time_s: ArrayLike) -> NDArray[np.float64]:
    """Angle the incoming side gains while the switch closes: ``360 * slip * t_close`` (deg, signed)."""
    return 360.0 * np.asarray(slip, dtype=float) * np.asarray(closing_time_s, dtype=float)


def window_time_s(dphi_limit_deg: ArrayLike, slip: ArrayLike) -> NDArray[np.float64]:
    """Time the phase difference stays inside ``+-dphi_limit``: ``2 * dphi_limit / (360 * |slip|)`` (s)."""
    s = np.abs(np.asarray(slip, dtype=float))
    lim = np.asarray(dphi_limit_deg, dtype=float)
    with np.errstate(divide="ignore"):
        return np.where(s > 0.0, 2.0 * lim / (360.0 * np.where(s > 0.0, s, 1.0)), np.inf)


def phase_difference_deg(dphi0_deg: ArrayLike, slip: ArrayLike, elapsed_s: ArrayLike) -> NDArray[np.float64]:
    """Phase difference ``elapsed_s`` after the data: ``wrap(dphi0 + 360 * slip * elapsed)`` (deg)."""
    return wrap_deg(np.asarray(dphi0_deg, dtype=float)
                    + 360.0 * np.asarray(slip, dtype=float) * np.asarray(elapsed_s, dtype=float))


def voltage_across_rms(v_incoming: ArrayLike, v_running: ArrayLike, dphi_deg: ArrayLike) -> NDArray[np.float64]:
    """RMS voltage across the open switch from the two phasors: ``sqrt(Vi^2 + Vr^2 - 2 Vi Vr cos dphi)`` (V)."""
    vi = np.asarray(v_incoming, dtype=float)
    vr = np.asarray(v_running, dtype=float)
    c = np.cos(np.radians(np.asarray(dphi_deg, dtype=float)))
    # max(0, .) guards the rounding just below zero at dphi = 0 with equal voltages
    return np.sqrt(np.maximum(vi * vi + vr * vr - 2.0 * vi * vr * c, 0.0))


def lamp_brightness(v_across: ArrayLike, v_incoming: ArrayLike, v_running: ArrayLike) -> NDArray[np.float64]:
    """Brightness proxy of a lamp across the switch: ``(V_across / (V_in + V_run))^2``.

    Proportional to the power a fixed resistance would take (common practice; a real filament's resistance
    rises with temperature). 0 = dark (in phase, equal voltages), 1 = brightest (in opposition).
    """
    total = np.asarray(v_incoming, dtype=float) + np.asarray(v_running, dtype=float)
    return (np.asarray(v_across, dtype=float) / total) ** 2


# -- one side of the switch ------------------------------------------------------------------------------
@dataclass(frozen=True)
class SideState:
    """One side of the synchronizing switch at the data's time stamp.

    Attributes
    ----------
    v_rms
        RMS voltage (V), on the bench's voltage basis.
    frequency_hz
        Frequency (Hz).
    angle_deg
        Phasor angle at the data's time stamp against a common reference (deg).
    """

    v_rms: float
    frequency_hz: float
    angle_deg: float = 0.0

    def __post_init__(self) -> None:
        if not (math.isfinite(self.v_rms) and self.v_rms > 0):
            msg = f"v_rms: expected a positive RMS voltage in V, found {self.v_rms!r}"
            raise ModelInputError(msg)
        if not (math.isfinite(self.frequency_hz) and self.frequency_hz > 0):
            msg = f"frequency_hz: expected a positive frequency in Hz, found {self.frequency_hz!r}"
            raise ModelInputError(msg)
        if not math.isfinite(self.angle_deg):
            msg = f"angle_deg: expected a finite angle in degrees, found {self.angle_deg!r}"
            raise ModelInputError(msg)

    def waveform(self, t_s: ArrayLike, data_time_s: float = 0.0) -> NDArray[np.float64]:
        """Instantaneous voltage ``sqrt(2) V cos(2 pi f (t - t_data) + angle)`` (V)."""
        tau = np.asarray(t_s, dtype=float) - data_time_s
        return math.sqrt(2.0) * self.v_rms * np.cos(2.0 * np.pi * self.frequency_hz * tau
                                                     + np.radians(self.angle_deg))


def voltage_across_waveform(t_s: ArrayLike, incoming: SideState, running: SideState,
                            data_time_s: float = 0.0) -> NDArray[np.float64]:
    """Instantaneous voltage across the open switch, ``v_in(t) - v_run(t)`` (V)."""
    return incoming.waveform(t_s, data_time_s) - running.waveform(t_s, data_time_s)


def voltage_across_envelope(t_s: ArrayLike, incoming: SideState, running: SideState,
                            data_time_s: float = 0.0) -> NDArray[np.float64]:
    """Peak envelope of the voltage across the open switch, ``sqrt(2) * |V_in - V_run|`` as phasors (V).

    For equal voltages in phase at ``t_data`` this is ``2 sqrt(2) V |sin(pi * slip * (t - t_data))|``.
    """
    s = slip_hz(incoming.frequency_hz, running.frequency_hz)
    dphi = phase_difference_deg(incoming.angle_deg - running.angle_deg, s, np.asarray(t_s, dtype=float) - data_time_s)
    return math.sqrt(2.0) * voltage_across_rms(incoming.v_rms, running.v_rms, dphi)


# -- checking against a limit set ------------------------------------------------------------------------
def _inside(value: NDArray[np.float64], low: float, high: float) -> NDArray[np.bool_]:
    allowance_low = _BOUNDARY_RTOL * max(abs(low), 1e-300)
    allowance_high = _BOUNDARY_RTOL * max(abs(high), 1e-300)
    return (value >= low - allowance_low) & (value <= high + allowance_high)


def voltage_difference(v_incoming: ArrayLike, v_running: ArrayLike, limits: SyncLimitSet,
                       v_nominal: float | None = None) -> NDArray[np.float64]:
    """``(V_in - V_run) / base`` as a fraction, with the base the limit set names.

    Raises
    ------
    ModelInputError
        When the set's base is the nominal voltage and ``v_nominal`` is not a positive number.
    """
    diff = sync_difference(v_incoming, v_running)
    if limits.voltage_base == "nominal":
        if v_nominal is None or not (math.isfinite(v_nominal) and v_nominal > 0):
            msg = (f"{limits.title}: the voltage difference is taken over the nominal voltage; "
                   f"expected v_nominal as a positive voltage in V, found {v_nominal!r}")
            raise ModelInputError(msg)
        return diff / v_nominal
    return diff / np.asarray(v_running, dtype=float)


def within_limits(slip: ArrayLike, v_incoming: ArrayLike, v_running: ArrayLike, dphi_deg: ArrayLike,
                  limits: SyncLimitSet, v_nominal: float | None = None) -> dict[str, NDArray[np.bool_]]:
    """Element-wise check of slip, voltage difference and phase difference (boundaries inclusive).

    Returns
    -------
    dict
        ``slip``, ``voltage``, ``phase`` and ``all``: boolean arrays broadcast from the inputs.
    """
    s = np.asarray(slip, dtype=float)
    dv = voltage_difference(v_incoming, v_running, limits, v_nominal)
    dphi = wrap_deg(dphi_deg)
    ok_slip = _inside(s, -limits.max_slip_hz, limits.max_slip_hz)
    ok_v = _inside(dv, limits.dv_min, limits.dv_max)
    ok_phase = _inside(dphi, -limits.max_dphi_deg, limits.max_dphi_deg)
    ok_slip, ok_v, ok_phase = np.broadcast_arrays(ok_slip, ok_v, ok_phase)
    return {"slip": ok_slip, "voltage": ok_v, "phase": ok_phase, "all": ok_slip & ok_v & ok_phase}


@dataclass(frozen=True)
class SyncVerdict:
    """The verdict on one (slip, dV, dphi) point against one limit set; the supervisor decides."""

    within: bool
    limits: SyncLimitSet
    slip_hz: float
    dv: float  # fraction of the limit set's base
    dphi_deg: float
    failures: tuple[str, ...]

    @property
    def text(self) -> str:
        """``within the configured limits (...)`` or ``outside the configured limits (...)``."""
        if self.within:
            return f"within the configured limits ({self.limits.title})"
        return f"outside the configured limits ({self.limits.title}: {'; '.join(self.failures)})"


def sync_verdict(slip: float, v_incoming: float, v_running: float, dphi_deg: float, limits: SyncLimitSet,
                 v_nominal: float | None = None) -> SyncVerdict:
    """Verdict on one operating point: which parameter is outside which limit, worded for the log."""
    ok = within_limits(slip, v_incoming, v_running, dphi_deg, limits, v_nominal)
    dv = float(voltage_difference(v_incoming, v_running, limits, v_nominal))
    dphi = float(wrap_deg(dphi_deg))
    failures: list[str] = []
    if not bool(ok["slip"]):
        failures.append(f"slip {slip:+.3f} Hz, limit +-{limits.max_slip_hz:g} Hz")
    if not bool(ok["voltage"]):
        failures.append(f"voltage difference {100 * dv:+.2f} % of the {limits.voltage_base} voltage, window "
                        f"{100 * limits.dv_min:+g} .. {100 * limits.dv_max:+g} %")
    if not bool(ok["phase"]):
        failures.append(f"phase difference {dphi:+.1f} deg, limit +-{limits.max_dphi_deg:g} deg")
    return SyncVerdict(bool(ok["all"]), limits, float(slip), dv, dphi, tuple(failures))


# -- closing windows -------------------------------------------------------------------------------------
def closing_windows(dphi0_deg: float, slip: float, dphi_limit_deg: float, t_from_s: float, t_to_s: float
                    ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Intervals of elapsed time (since the data) in ``[t_from, t_to]`` where ``|dphi(t)| <= dphi_limit``.

    ``dphi(t) = dphi0 + 360 * slip * t``; the dark points are where the unwrapped phase difference is a
    multiple of 360 deg, and each window spans ``dphi_limit / (360 |slip|)`` either side of one.

    Returns
    -------
    (starts, ends)
        Arrays of window start and end times (s after the data), in order; empty when there is none.
    """
    if t_to_s < t_from_s:
        return np.empty(0), np.empty(0)
    if slip == 0.0:
        if abs(float(wrap_deg(dphi0_deg))) <= dphi_limit_deg * (1 + _BOUNDARY_RTOL):
            return np.array([t_from_s]), np.array([t_to_s])
        return np.empty(0), np.empty(0)
    rate = 360.0 * slip  # deg/s
    half = dphi_limit_deg / (360.0 * abs(slip))
    # dark points t_k = (360 k - dphi0) / rate for integer k, the k range covering [t_from - half, t_to + half]
    k_ends = (np.array([t_from_s - half, t_to_s + half]) * rate + dphi0_deg) / 360.0
    k = np.arange(math.floor(k_ends.min()), math.ceil(k_ends.max()) + 1)
    centers = np.sort((360.0 * k - dphi0_deg) / rate)
    starts = np.maximum(centers - half, t_from_s)
    ends = np.minimum(centers + half, t_to_s)
    keep = ends >= starts
    return starts[keep], ends[keep]


@dataclass(frozen=True)
class SyncPrediction:
    """What the two sides' data say about closing, extrapolated from the data's time stamp.

    Times ``window_*`` are absolute (same clock as ``data_time_s`` and ``now_s``). ``window_touch_*`` are
    when the contacts touch; ``window_command_*`` are when to command the close (earlier by the closing time).
    """

    incoming: SideState
    running: SideState
    limits: SyncLimitSet
    data_time_s: float
    now_s: float
    closing_time_s: float
    slip_hz: float
    beat_period_s: float
    dv_running: float  # (V_in - V_run) / V_run, fraction (the registered dv_sync)
    dv_on_base: float  # (V_in - V_run) / the limit set's base, fraction
    dphi_data_deg: float
    dphi_now_deg: float
    dphi_at_touch_deg: float
    advance_angle_deg: float
    v_across_now_v: float
    lamp_now: float
    verdict_if_closed_now: SyncVerdict
    window_touch_start_s: NDArray[np.float64]
    window_touch_end_s: NDArray[np.float64]
    advice: tuple[str, ...] = field(default_factory=tuple)

    @property
    def data_age_s(self) -> float:
        """How old the data are at ``now`` (s)."""
        return self.now_s - self.data_time_s

    @property
    def permissive(self) -> bool:
        """True when a close commanded now would touch within the configured limits."""
        return self.verdict_if_closed_now.within

    @property
    def window_command_start_s(self) -> NDArray[np.float64]:
        """When to command the close for each window's start (s, absolute)."""
        return self.window_touch_start_s - self.closing_time_s

    @property
    def window_command_end_s(self) -> NDArray[np.float64]:
        """Last moment to command the close inside each window (s, absolute)."""
        return self.window_touch_end_s - self.closing_time_s

    def phase_trajectory(self, t_s: ArrayLike) -> NDArray[np.float64]:
        """Phase difference at absolute times ``t_s``, extrapolated from the data (deg)."""
        return phase_difference_deg(self.dphi_data_deg, self.slip_hz, np.asarray(t_s, dtype=float) - self.data_time_s)

    def as_dict(self) -> dict[str, object]:
        """JSON-ready summary (registered quantity names where one exists)."""
        return {
            "slip_hz": self.slip_hz,
            "beat_period_s": None if math.isinf(self.beat_period_s) else self.beat_period_s,
            "dv_pct": 100.0 * self.dv_running,
            "dv_on_limit_base_pct": 100.0 * self.dv_on_base,
            "dphi_deg": self.dphi_now_deg,
            "dphi_at_data_deg": self.dphi_data_deg,
            "dphi_at_touch_deg": self.dphi_at_touch_deg,
            "data_age_s": self.data_age_s,
            "closing_time_s": self.closing_time_s,
            "advance_angle_deg": self.advance_angle_deg,
            "v_across_v": self.v_across_now_v,
            "lamp_brightness": self.lamp_now,
            "permissive": self.permissive,
            "verdict": self.verdict_if_closed_now.text,
            "limits": self.limits.as_dict(),
            "windows": [
                {"command_start_s": float(cs), "command_end_s": float(ce), "touch_start_s": float(ts),
                 "touch_end_s": float(te)}
                for cs, ce, ts, te in zip(self.window_command_start_s, self.window_command_end_s,
                                          self.window_touch_start_s, self.window_touch_end_s, strict=True)
            ],
            "advice": list(self.advice),
            "caution": CAUTION,
        }


def predict_sync(incoming: SideState, running: SideState, limits: SyncLimitSet, *, data_time_s: float = 0.0,
                 now_s: float | None = None, closing_time_s: float = 0.0, n_beats: float = 3.0,
                 max_horizon_s: float = 120.0, v_nominal: float | None = None,
                 incoming_name: str = "the incoming set", field_setting: float | None = None) -> SyncPrediction:
    """Predict slip, beat, phase trajectory, closing windows and advice from both sides' data.

    Parameters
    ----------
    incoming, running
        The two sides at ``data_time_s`` (RMS V, Hz, deg).
    limits
        The limit set to judge against.
    data_time_s
        Time stamp of the data (s, any clock).
    now_s
        The present time on the same clock (s); defaults to ``data_time_s`` (age 0).
    closing_time_s
        Time from the close command to the contacts touching (s).
    n_beats
        Look-ahead for the windows, in beat periods, capped at ``max_horizon_s`` (s).
    v_nominal
        Nominal voltage (V); needed by limit sets whose voltage base is nominal (IEEE 1547).
    incoming_name
        Name used in the advice ("G1").
    field_setting
        Present field setting of the incoming set (fraction of rated); lets the advice give a new setting.

    Returns
    -------
    SyncPrediction
    """
    if not (math.isfinite(closing_time_s) and closing_time_s >= 0):
        msg = f"closing_time_s: expected a closing time >= 0 s, found {closing_time_s!r}"
        raise ModelInputError(msg)
    if not (math.isfinite(n_beats) and n_beats > 0):
        msg = f"n_beats: expected a positive number of beat periods, found {n_beats!r}"
        raise ModelInputError(msg)
    now = data_time_s if now_s is None else float(now_s)
    age = now - data_time_s
    if age < 0:
        msg = f"now_s ({now}) is before the data's time stamp ({data_time_s}); expected now >= data time"
        raise ModelInputError(msg)
    s = float(slip_hz(incoming.frequency_hz, running.frequency_hz))
    beat = float(beat_period_s(s))
    dphi_data = float(wrap_deg(incoming.angle_deg - running.angle_deg))
    dphi_now = float(phase_difference_deg(dphi_data, s, age))
    dphi_touch = float(phase_difference_deg(dphi_data, s, age + closing_time_s))
    verdict = sync_verdict(s, incoming.v_rms, running.v_rms, dphi_touch, limits, v_nominal)
    v_across = float(voltage_across_rms(incoming.v_rms, running.v_rms, dphi_now))

    # Windows exist only while slip and voltage are inside: extrapolation holds them constant.
    horizon = min(n_beats * beat, max_horizon_s)
    if not within_limits(s, incoming.v_rms, running.v_rms, 0.0, limits, v_nominal)["all"]:
        starts, ends = np.empty(0), np.empty(0)
    else:
        starts, ends = closing_windows(dphi_data, s, limits.max_dphi_deg, age + closing_time_s,
                                       age + closing_time_s + horizon)
    advice = sync_advice(s, incoming.v_rms, running.v_rms, dphi_touch, limits, v_nominal=v_nominal,
                         incoming_name=incoming_name, field_setting=field_setting,
                         next_window_in_s=(float(starts[0]) - closing_time_s - age) if starts.size else None,
                         closing_time_s=closing_time_s)
    return SyncPrediction(
        incoming=incoming, running=running, limits=limits, data_time_s=data_time_s, now_s=now,
        closing_time_s=closing_time_s, slip_hz=s, beat_period_s=beat,
        dv_running=float(sync_difference(incoming.v_rms, running.v_rms) / running.v_rms),
        dv_on_base=verdict.dv, dphi_data_deg=dphi_data, dphi_now_deg=dphi_now, dphi_at_touch_deg=dphi_touch,
        advance_angle_deg=float(advance_angle_deg(s, closing_time_s)), v_across_now_v=v_across,
        lamp_now=float(lamp_brightness(v_across, incoming.v_rms, running.v_rms)), verdict_if_closed_now=verdict,
        window_touch_start_s=starts + data_time_s, window_touch_end_s=ends + data_time_s, advice=tuple(advice),
    )


# -- advice ----------------------------------------------------------------------------------------------
def sync_advice(slip: float, v_incoming: float, v_running: float, dphi_at_touch_deg: float, limits: SyncLimitSet,
                *, v_nominal: float | None = None, incoming_name: str = "the incoming set",
                field_setting: float | None = None, next_window_in_s: float | None = None,
                closing_time_s: float = 0.0) -> list[str]:
    """Plain-worded trims for the incoming set's frequency setpoint and field, then when to close.

    The frequency target is a slow positive slip of half the limit (incoming slightly fast, so it takes up a
    little load on closing rather than drawing power: common practice); the voltage target is the middle of
    the limit set's window (on its own base).
    """
    name = incoming_name
    out: list[str] = []
    ok = within_limits(slip, v_incoming, v_running, dphi_at_touch_deg, limits, v_nominal)
    target_slip = 0.5 * limits.max_slip_hz
    if not bool(ok["slip"]) or slip < 0.0:
        trim = target_slip - slip
        verb = "raise" if trim > 0 else "lower"
        why = "slip outside the configured limit" if not bool(ok["slip"]) else (
            "slip inside the limit but the incoming set is slower than the running side")
        out.append(f"{verb} {name}'s frequency setpoint by {abs(trim):.2f} Hz ({why}; aim for a slip of about "
                   f"{target_slip:+.3f} Hz, incoming slightly fast)")
    base = v_nominal if limits.voltage_base == "nominal" else v_running
    if not bool(ok["voltage"]):
        target_v = v_running + 0.5 * (limits.dv_min + limits.dv_max) * float(base)  # type: ignore[arg-type]
        dv_v = target_v - v_incoming
        verb = "raise" if dv_v > 0 else "lower"
        text = f"{verb} {name}'s field (voltage) by about {abs(dv_v):.1f} V, to about {target_v:.1f} V"
        if field_setting is not None and field_setting > 0:
            # open-circuit EMF is proportional to field at fixed speed (saturation neglected)
            text += f" (field setting from {field_setting:.3f} to about {field_setting * target_v / v_incoming:.3f})"
        out.append(text)
    if bool(ok["slip"]) and bool(ok["voltage"]) and slip >= 0.0:
        if bool(ok["phase"]):
            out.append(f"a close commanded now would touch within the configured limits ({limits.title}); "
                       "the supervisor decides")
        elif next_window_in_s is not None:
            adv = float(advance_angle_deg(slip, closing_time_s))
            out.append(f"hold the settings and wait: the next window opens in {next_window_in_s:.2f} s "
                       f"(command about {1000 * closing_time_s:.0f} ms ahead of the dark point, an advance "
                       f"angle of {adv:.1f} deg)")
        else:
            out.append(f"the phase difference is not coming round: raise {name}'s frequency setpoint by about "
                       f"{target_slip:.3f} Hz so the dark point comes round")
    return out


# -- closing surge ---------------------------------------------------------------------------------------
@dataclass(frozen=True)
class SurgeEstimate:
    """First-cycle closing-current estimate ``sqrt(2) |V_across| / |Z_between|``."""

    peak_a: NDArray[np.float64]
    v_across_rms_v: NDArray[np.float64]
    z_between_ohm: complex
    basis: str


def closing_surge_estimate(v_across_rms_v: ArrayLike, x_subtransient_ohm: float | Sequence[float],
                           z_network_ohm: complex = 0j) -> SurgeEstimate:
    """Estimate the first-cycle peak current when the switch closes with ``V_across`` across it.

    Parameters
    ----------
    v_across_rms_v
        RMS voltage across the open switch at the moment of closing (V); any shape.
    x_subtransient_ohm
        Subtransient reactance(s) X'' of the machine(s) whose EMFs drive the surge (ohm); summed as ``j X''``.
    z_network_ohm
        Network impedance between the two EMFs not already in ``x_subtransient_ohm``: the Thevenin impedance of
        the running side seen at the switch (ohm, complex).

    Returns
    -------
    SurgeEstimate
        ``peak_a = sqrt(2) * |V_across| / |j sum(X'') + Z_network|``: an estimate on that basis only (no dc
        offset doubling, no decay, no saturation).
    """
    x = np.atleast_1d(np.asarray(x_subtransient_ohm, dtype=float))
    if np.any(~np.isfinite(x)) or np.any(x < 0):
        msg = f"x_subtransient_ohm: expected reactances >= 0 ohm, found {x.tolist()}"
        raise ModelInputError(msg)
    z = 1j * float(x.sum()) + complex(z_network_ohm)
    if abs(z) == 0.0:
        msg = "the impedance between the EMFs is zero: give X'' and/or the network impedance"
        raise ModelInputError(msg)
    v = np.abs(np.asarray(v_across_rms_v, dtype=float))
    basis = (f"estimate: sqrt(2) x |V_across| / |Z_between|, Z_between = j{x.sum():.4g} ohm (X'') + network "
             f"{complex(z_network_ohm):.4g} ohm; no dc offset, decay or saturation")
    return SurgeEstimate(math.sqrt(2.0) * v / abs(z), v, z, basis)


# -- sine fitting and waveforms around a close -----------------------------------------------------------
@dataclass(frozen=True)
class SineFit:
    """Least-squares fit ``sqrt(2) V cos(2 pi f (t - t_ref) + angle) + offset`` for each channel."""

    v_rms: NDArray[np.float64]
    frequency_hz: NDArray[np.float64]
    angle_deg: NDArray[np.float64]
    offset: NDArray[np.float64]
    residual_rms: NDArray[np.float64]
    t_ref_s: float


def _uniform_step(t: NDArray[np.float64], where: str) -> float:
    if t.ndim != 1 or t.size < 8:
        msg = f"{where}: expected a 1-D time axis with at least 8 samples, found shape {t.shape}"
        raise ModelInputError(msg)
    dt = np.diff(t)
    step = float(np.median(dt))
    if step <= 0 or np.any(np.abs(dt - step) > 1e-6 * step + 1e-12):
        msg = f"{where}: expected uniformly sampled, increasing times (step {step:g} s)"
        raise ModelInputError(msg)
    return step


def _solve_batched(basis: NDArray[np.float64], y: NDArray[np.float64]) -> NDArray[np.float64]:
    """Least squares for each channel: basis (channels, n, k), y (channels, n) -> (channels, k)."""
    normal = np.einsum("cni,cnj->cij", basis, basis)
    rhs = np.einsum("cni,cn->ci", basis, y)
    return np.linalg.solve(normal, rhs[..., None])[..., 0]


def _gauss_newton_sine(tau: NDArray[np.float64], y: NDArray[np.float64], omega0: NDArray[np.float64],
                       n_iter: int = 12) -> tuple[NDArray[np.float64], ...]:
    """Four-parameter fit ``a cos(w tau) + b sin(w tau) + c`` for each row of ``y`` (batched normal equations)."""
    omega = omega0.astype(float).copy()
    n_ch = y.shape[0]
    params = np.zeros((n_ch, 4))
    for iteration in range(n_iter):  # iterations of the solver, not a loop over samples
        ph = omega[:, None] * tau[None, :]
        c, s = np.cos(ph), np.sin(ph)
        a, b = params[:, 0:1], params[:, 1:2]
        if iteration == 0:  # first pass: linear three-parameter fit at omega0
            basis = np.stack([c, s, np.ones_like(c)], axis=-1)
            sol = _solve_batched(basis, y)
            params[:, :3] = sol
            continue
        dw = tau[None, :] * (-a * s + b * c)
        basis = np.stack([c, s, np.ones_like(c), dw], axis=-1)
        resid = y - (a * c + b * s + params[:, 2:3])
        step = _solve_batched(basis, resid)
        params[:, :3] += step[:, :3]
        omega = omega + step[:, 3]
        if np.all(np.abs(step[:, 3]) < 1e-12 * np.abs(omega)):
            break
    ph = omega[:, None] * tau[None, :]
    model = params[:, 0:1] * np.cos(ph) + params[:, 1:2] * np.sin(ph) + params[:, 2:3]
    resid_rms = np.sqrt(np.mean((y - model) ** 2, axis=1))
    return params[:, 0], params[:, 1], params[:, 2], omega, resid_rms


def fit_sines(t_s: ArrayLike, v: ArrayLike, f_guess_hz: float, t_ref_s: float) -> SineFit:
    """Fit one sine (with offset and frequency) to each channel of ``v`` over the samples given.

    The initial frequency comes from the phase drift between successive one-cycle windows at ``f_guess_hz``
    (good while the true frequency is within about a quarter of ``f_guess_hz``), then a Gauss-Newton
    four-parameter fit refines amplitude, angle (at ``t_ref_s``), offset and frequency.

    Parameters
    ----------
    t_s
        Uniformly sampled times (s), at least two cycles' worth.
    v
        Samples, shape ``(n,)`` or ``(channels, n)`` (V).
    f_guess_hz
        Nominal frequency (Hz).
    t_ref_s
        Time at which the fitted angles hold (s).
    """
    t = np.asarray(t_s, dtype=float)
    step = _uniform_step(t, "fit_sines t_s")
    y = np.atleast_2d(np.asarray(v, dtype=float))
    if y.shape[1] != t.size:
        msg = f"fit_sines: expected samples of length {t.size} matching t_s, found shape {y.shape}"
        raise ModelInputError(msg)
    m = round(1.0 / (f_guess_hz * step))  # samples per nominal cycle
    n_cycles = t.size // max(m, 1)
    if m < 4 or n_cycles < 2:
        msg = (f"fit_sines: expected at least 2 cycles at {f_guess_hz:g} Hz with >= 4 samples each; "
               f"found {t.size} samples at {step:g} s")
        raise ModelInputError(msg)
    # per-cycle linear fits at f_guess, all windows sharing one design matrix (time from each window's start)
    w0 = 2.0 * np.pi * f_guess_hz
    local = np.arange(m) * step
    design = np.stack([np.cos(w0 * local), np.sin(w0 * local), np.ones(m)], axis=-1)
    blocks = y[:, : n_cycles * m].reshape(y.shape[0], n_cycles, m)
    coef = np.linalg.lstsq(design, blocks.reshape(-1, m).T, rcond=None)[0].T.reshape(y.shape[0], n_cycles, 3)
    theta = np.arctan2(-coef[..., 1], coef[..., 0])
    window_len = m * step
    cycles_per_window = round(f_guess_hz * window_len)
    dtheta = np.angle(np.exp(1j * np.diff(theta, axis=1)))
    f0 = (cycles_per_window + np.mean(dtheta, axis=1) / (2.0 * np.pi)) / window_len
    a, b, c, omega, resid = _gauss_newton_sine(t - t_ref_s, y, 2.0 * np.pi * f0)
    amp = np.hypot(a, b)
    return SineFit(v_rms=amp / math.sqrt(2.0), frequency_hz=omega / (2.0 * np.pi),
                   angle_deg=np.asarray(wrap_deg(np.degrees(np.arctan2(-b, a)))), offset=c,
                   residual_rms=resid, t_ref_s=t_ref_s)


@dataclass(frozen=True)
class CloseEstimate:
    """Slip, voltage and phase differences at a recorded close, estimated from the last cycles before it."""

    t_close_s: float
    n_cycles: int
    incoming: SideState
    running: SideState
    slip_hz: float
    dv_running: float  # (V_in - V_run) / V_run
    dphi_deg: float
    residual_rms_v: tuple[float, float]


def estimate_close_from_waveforms(t_s: ArrayLike, v_incoming: ArrayLike, v_running: ArrayLike, t_close_s: float,
                                  f_nominal_hz: float, n_cycles: int = 4) -> CloseEstimate:
    """Estimate slip, dV and dphi at ``t_close_s`` from the ``n_cycles`` nominal cycles just before it.

    Parameters
    ----------
    t_s
        Common, uniformly sampled time axis of both channels (s).
    v_incoming, v_running
        Instantaneous voltages of the incoming and running sides (V).
    t_close_s
        The closing instant (contacts touching) on the same clock (s).
    f_nominal_hz
        Nominal frequency (Hz), the fit's starting point.
    n_cycles
        Number of nominal cycles before the close used for the fit (>= 2).
    """
    t = np.asarray(t_s, dtype=float)
    _uniform_step(t, "estimate_close_from_waveforms t_s")
    vi = np.asarray(v_incoming, dtype=float)
    vr = np.asarray(v_running, dtype=float)
    if vi.shape != t.shape or vr.shape != t.shape:
        msg = (f"estimate_close_from_waveforms: expected both channels with the shape of t_s {t.shape}, "
               f"found {vi.shape} and {vr.shape}")
        raise ModelInputError(msg)
    if n_cycles < 2:
        msg = f"n_cycles: expected at least 2 cycles before the close, found {n_cycles}"
        raise ModelInputError(msg)
    start = t_close_s - n_cycles / f_nominal_hz
    if start < t[0] - 1e-12 or t_close_s > t[-1] + (t[1] - t[0]):
        msg = (f"estimate_close_from_waveforms: the {n_cycles} cycles before t_close_s = {t_close_s:g} s start at "
               f"{start:g} s; expected the capture to cover them ({t[0]:g} .. {t[-1]:g} s)")
        raise ModelInputError(msg)
    sel = (t >= start) & (t < t_close_s)
    fit = fit_sines(t[sel], np.stack([vi[sel], vr[sel]]), f_nominal_hz, t_close_s)
    inc = SideState(float(fit.v_rms[0]), float(fit.frequency_hz[0]), float(fit.angle_deg[0]))
    run = SideState(float(fit.v_rms[1]), float(fit.frequency_hz[1]), float(fit.angle_deg[1]))
    return CloseEstimate(
        t_close_s=t_close_s, n_cycles=n_cycles, incoming=inc, running=run,
        slip_hz=inc.frequency_hz - run.frequency_hz, dv_running=(inc.v_rms - run.v_rms) / run.v_rms,
        dphi_deg=float(wrap_deg(inc.angle_deg - run.angle_deg)),
        residual_rms_v=(float(fit.residual_rms[0]), float(fit.residual_rms[1])),
    )


def recorded_close_verdict(slip: float, dv_running: float, dphi_deg: float, limits: SyncLimitSet, *,
                           v_running: float | None = None, v_nominal: float | None = None) -> SyncVerdict:
    """Verdict on a recorded close from entered values at the close.

    Parameters
    ----------
    slip
        Slip at the close, incoming minus running (Hz).
    dv_running
        ``(V_in - V_run) / V_run`` at the close (fraction).
    dphi_deg
        Phase difference at the close, incoming minus running (deg).
    v_running
        Running-side RMS voltage (V); when omitted it is taken equal to ``v_nominal`` (or 1 pu), which only
        matters for limit sets on a nominal base.
    v_nominal
        Nominal voltage (V), for limit sets on a nominal base.
    """
    vr = v_running if v_running is not None else (v_nominal if v_nominal is not None else 1.0)
    vn = v_nominal if v_nominal is not None else (vr if limits.voltage_base == "nominal" else None)
    return sync_verdict(slip, vr * (1.0 + dv_running), vr, dphi_deg, limits, vn)


# -- beat from the voltage across the switch -------------------------------------------------------------
@dataclass(frozen=True)
class BeatMeasurement:
    """Beat of the voltage across the switch, from its envelope."""

    beat_period_s: float
    slip_abs_hz: float
    envelope_peak_v: float
    envelope_min_v: float


def measure_beat(t_s: ArrayLike, v_incoming: ArrayLike, v_running: ArrayLike, edge_fraction: float = 0.05
                 ) -> BeatMeasurement:
    """Beat period and envelope extremes of ``v_in - v_run`` from a capture spanning at least one beat.

    The envelope comes from the analytic signal (scipy.signal.hilbert); its square is
    ``Vpk_in^2 + Vpk_run^2 - 2 Vpk_in Vpk_run cos(2 pi slip t + phi)``, a sinusoid at the slip frequency, which
    is then fitted (four-parameter least squares) after dropping ``edge_fraction`` of the record at each end.
    """
    t = np.asarray(t_s, dtype=float)
    step = _uniform_step(t, "measure_beat t_s")
    diff = np.asarray(v_incoming, dtype=float) - np.asarray(v_running, dtype=float)
    if diff.shape != t.shape:
        msg = f"measure_beat: expected channels with the shape of t_s {t.shape}, found {diff.shape}"
        raise ModelInputError(msg)
    env2 = np.abs(hilbert(diff)) ** 2
    cut = int(edge_fraction * t.size)
    tt, ee = t[cut: t.size - cut], env2[cut: t.size - cut]
    # initial slip from the zero-padded spectrum of the squared envelope
    n_fft = 8 * int(2 ** math.ceil(math.log2(ee.size)))
    spec = np.abs(np.fft.rfft(ee - ee.mean(), n_fft))
    freqs = np.fft.rfftfreq(n_fft, step)
    f_beat0 = float(freqs[1 + int(np.argmax(spec[1:]))])
    if f_beat0 * (tt[-1] - tt[0]) < 1.0:
        msg = ("measure_beat: the capture spans less than one beat period; expected a record longer than "
               f"1/|slip| (found {tt[-1] - tt[0]:.3g} s usable, beat estimate {1 / f_beat0:.3g} s)")
        raise ModelInputError(msg)
    a, b, c, omega, _ = _gauss_newton_sine(tt - tt[0], ee[None, :], np.array([2.0 * np.pi * f_beat0]))
    amp = float(np.hypot(a[0], b[0]))
    fs = abs(float(omega[0])) / (2.0 * np.pi)
    return BeatMeasurement(beat_period_s=1.0 / fs, slip_abs_hz=fs, envelope_peak_v=math.sqrt(c[0] + amp),
                           envelope_min_v=math.sqrt(max(c[0] - amp, 0.0)))
