"""The session runner: one group's lab session from planned to closed, step by step, every reading recorded.

A session is a template on a bench (type and cart) for one section, group and cart, with the
(pseudonymous) participants present. Everything the runner does is an archive row: state
changes, step moves and the as-found source values are events, readings are reading rows; a
runner re-created from the archive (:meth:`SessionRunner.resume`) is exactly where it was.

States and who may change them (every other change is refused, and so is any change of a
closed session; ``docs/verdicts.md`` has the same table)::

    from -> to             student  ta   instructor
    planned -> open          yes    yes     yes
    open -> submitted        yes    yes     yes
    submitted -> open        no     yes     yes      (returned for more readings)
    submitted -> closed      no     yes     yes
    open -> closed           no     no      yes      (an abandoned session)

Readings and step moves are taken only while the session is open (a student must be among
the people present). A closed session takes only corrections by staff (ta or instructor),
each with a reason.

Steps
    :meth:`forward`, :meth:`back` and :meth:`skip` (with a reason) move through the template;
    a skipped step's changes are not made on the bench (unless ``applied=True``), so later
    steps are predicted for the bench as it really stands. Going forward from a step performs it.
Calibration steps
    At a ``calibration`` step, :meth:`calibrate` compares the step's sensor's capture with a
    reference meter's reading (entered with the meter's id and accuracy), records the corrections
    as a ``calibration`` event and the reading judged against the reference meter (not the model);
    later captures of that sensor are corrected through the channel map (also after :meth:`resume`).
    See :mod:`labkit.session.calibration`.
As-found source values
    At a ``source_start`` step, :meth:`set_as_found` records the source's voltage and frequency
    as found (typed or from a capture) and later steps are predicted from them, so the bands
    cover component tolerances rather than mains drift. The readings of the source_start step
    itself stay predicted from the nominal source (they show how far the source is from it).
    Each reading row's ``anchor`` says which it used.
"""

from __future__ import annotations

import json
import math
import uuid
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from labkit.core.bench import AlternatorSet, MainsReference
from labkit.core.cautions import step_cautions
from labkit.core.errors import LabkitError, UnknownNameError
from labkit.core.network import NetworkError, source_emf
from labkit.core.predict import DEFAULT_SAMPLES, DEFAULT_SEED, Prediction, predict_state
from labkit.core.quantities import quantity
from labkit.core.state import BenchState, SourceSetting, apply_step, initial_state, intermediate_states
from labkit.core.units import parse_quantity
from labkit.logbook.schema import ROLES, SESSION_KINDS
from labkit.logbook.storage import NotRecordedError
from labkit.session.calibration import (
    QUANTITY_OF_KIND,
    CalibrationError,
    SensorCalibration,
    compute_corrections,
    corrected_capture,
    meter_use,
    reference_value,
    seeded_gain_error,
)
from labkit.session.readings import (
    ChannelFault,
    ParsedReading,
    ReadingError,
    analyse_for,
    channels_for,
    location_spectrum,
    parse_typed,
    sensor_at,
    simulated_capture,
    value_from_analysis,
)
from labkit.session.verdict import (
    CURRENT_MAGNITUDES,
    POWERS,
    VOLTAGE_MAGNITUDES,
    Meter,
    instrument_tolerance,
    template_tolerance,
    verdict,
)

if TYPE_CHECKING:
    from labkit.captures.capture import Capture
    from labkit.core.bench import Bench
    from labkit.core.sync import SyncPrediction
    from labkit.core.template import ReadingSpec, SessionTemplate
    from labkit.core.waveform import WaveformAnalysis
    from labkit.files.loader import LoadedBench, LoadedTemplate
    from labkit.logbook.storage import Archive

STATES = ("planned", "open", "submitted", "closed")
STAFF = frozenset({"ta", "instructor"})
TRANSITIONS: dict[tuple[str, str], frozenset[str]] = {
    ("planned", "open"): frozenset(ROLES),
    ("open", "submitted"): frozenset(ROLES),
    ("submitted", "open"): STAFF,
    ("submitted", "closed"): STAFF,
    ("open", "closed"): frozenset({"instructor"}),
}
"""(from, to) -> the roles allowed to make that change; pairs not listed are refused for everyone."""

ANGLE_QUANTITIES = frozenset({"phase", "v_angle", "i_angle", "dphi_sync", "advance_angle"})


class SessionError(LabkitError, PermissionError):
    """An action the session's state or the actor's role does not allow (the message says which and why)."""


@dataclass(frozen=True)
class Actor:
    """Who acts: a pseudonymous participant or staff id and a role (student, ta, instructor)."""

    id: str
    role: str

    def __post_init__(self) -> None:
        if self.role not in ROLES:
            msg = f'role "{self.role}" of {self.id}: expected one of {", ".join(ROLES)}'
            raise SessionError(msg)
        if not self.id:
            msg = "an actor needs a participant or staff id"
            raise SessionError(msg)


@dataclass(frozen=True)
class AsFound:
    """As-found values of a started source, recorded at its source_start step.

    ``emf_scale`` multiplies the modelled EMF so the predicted voltage at ``location`` equals the
    as-found one; ``frequency_offset_hz`` shifts an alternator set's setpoint (a mains reference
    takes ``frequency_hz`` itself).
    """

    source: str
    step_index: int
    v_rms: float
    frequency_hz: float
    location: str
    emf_scale: float
    frequency_offset_hz: float
    seq: int = -1

    @property
    def label(self) -> str:
        """The anchor text reading rows carry."""
        return (f"as-found {self.source}: {self.v_rms:.5g} V at {self.location}, {self.frequency_hz:.5g} Hz"
                + (f" (event {self.seq})" if self.seq >= 0 else ""))


@dataclass(frozen=True)
class ExpectedReading:
    """One reading of a step as predicted: nominal, band, unit, the sensor, and why it may be missing."""

    spec_index: int
    spec: ReadingSpec
    predicted: float
    band_low: float
    band_high: float
    unit: str
    sensor: str = ""
    missing: str = ""


@dataclass
class FrequencyOutlook:
    """What the frequency does after a load step on a bench with alternator sets.

    ``values`` holds registered quantity names (``frequency``, ``f_nadir``, ``settling_time``,
    ``overshoot``) in their registry units; ``shares_w`` each source's pick-up of the change.
    """

    delta_p_w: float
    values: dict[str, float]
    shares_w: dict[str, float]
    lines: list[str]


@dataclass
class StepView:
    """Everything shown for one step: state, prediction, expected readings, cautions, sync and frequency."""

    index: int
    step: Any
    state: BenchState
    prediction: Prediction | None
    error: str
    expected: list[ExpectedReading]
    cautions: list[str]
    warnings: list[str]
    anchor: str
    skipped: str = ""
    sync: SyncPrediction | None = None
    frequency: FrequencyOutlook | None = None


@dataclass
class Entry:
    """A reading entered in the runner: recorded (with its committed row) or not recorded (retry possible)."""

    parsed: ParsedReading
    status: str  # "recorded" or "not recorded"
    actor: Actor
    meter: Meter | None = None
    note: str = ""
    reading_id: str = ""
    revision: int = 0
    reason: str = ""
    row: Mapping[str, Any] | None = None
    error: str = ""


@dataclass
class _Walk:
    current: int = 0
    skipped: dict[int, tuple[str, bool]] = field(default_factory=dict)  # index -> (reason, applied)


class SessionRunner:
    """Runs one session against an :class:`~labkit.logbook.storage.Archive`.

    Create one with :meth:`create` (a new session) or :meth:`resume` (from the archive).

    Parameters
    ----------
    archive
        Where everything is committed.
    bench, template
        The loaded bench (type and cart) and template, with their texts.
    session
        The session row (``SESSION_COLUMNS``).
    actor
        Who acts by default (each action can name another).
    decimal_comma
        Accept typed readings with a decimal comma (a configured locale).
    """

    def __init__(self, archive: Archive, bench: LoadedBench, template: LoadedTemplate,
                 session: Mapping[str, Any], actor: Actor, *, decimal_comma: bool = False) -> None:
        self.archive = archive
        self.loaded_bench = bench
        self.loaded_template = template
        self.session = dict(session)
        self.actor = actor
        self.decimal_comma = decimal_comma
        self.state_name: str = str(session.get("state", "planned"))
        self.n_samples = int(session.get("mc_samples", DEFAULT_SAMPLES))
        self.seed = int(session.get("mc_seed", DEFAULT_SEED))
        self._walk = _Walk()
        self.anchors: dict[str, AsFound] = {}
        self.calibrations: dict[str, SensorCalibration] = {}  # sensor id -> its latest calibration
        self.entries: list[Entry] = []
        self._views: dict[tuple, StepView] = {}
        self.diagnosis_budget_s = 1.0

    # -- creation and resume -----------------------------------------------------------------------------
    @classmethod
    def create(cls, archive: Archive, bench: LoadedBench, template: LoadedTemplate, *, section: str, group: str,
               people: Sequence[str], actor: Actor, cart: str | None = None, kind: str = "lab",
               n_samples: int = DEFAULT_SAMPLES, seed: int = DEFAULT_SEED, decimal_comma: bool = False,
               session_id: str | None = None) -> SessionRunner:
        """Create a planned session in the archive and return its runner."""
        row = session_row(bench, template, section=section, group=group, people=people, created_by=actor.id,
                          cart=cart, kind=kind, n_samples=n_samples, seed=seed, session_id=session_id)
        archive.create_session(row)
        return cls(archive, bench, template, row, actor, decimal_comma=decimal_comma)

    @classmethod
    def resume(cls, archive: Archive, session_id: str, actor: Actor, *, decimal_comma: bool = False
               ) -> SessionRunner:
        """Re-create the runner of a stored session: same state, step, skips, as-found values and readings."""
        from labkit.files.loader import SourceText, bench_from_data, parse_toml, template_from_data

        sessions = archive.sessions()
        match = sessions[sessions["session_id"] == session_id]
        if match.empty:
            msg = f'no session "{session_id}" in the archive'
            raise UnknownNameError(msg)
        row = {k: _plain(v) for k, v in match.iloc[0].to_dict().items()}
        bench_src = SourceText(f"{row['bench_id']} (archived)", str(row["bench_text"]))
        data, pos = parse_toml(bench_src)
        cart_text = str(row.get("cart_text") or "")
        cart_src = SourceText(f"{row['cart']} (archived)", cart_text) if cart_text else None
        bench = bench_from_data(bench_src, data, pos, cart_src)
        tpl_src = SourceText(f"{row['template_id']} (archived)", str(row["template_text"]))
        tdata, tpos = parse_toml(tpl_src)
        template = template_from_data(tpl_src, tdata, tpos, bench.bench)
        runner = cls(archive, bench, template, row, actor, decimal_comma=decimal_comma)
        runner._replay()
        return runner

    def _replay(self) -> None:
        events = self.archive.events(self.session_id)
        if not events.empty:
            events = events.sort_values("seq")
        state = "planned"
        for ev in events.to_dict("records"):
            name = str(ev["event"])
            detail = json.loads(ev["detail"]) if isinstance(ev.get("detail"), str) and ev["detail"] else {}
            if name.startswith("state:"):
                state = name.partition(":")[2]
            elif name in ("step:forward", "step:back", "step:skip"):
                self._apply_move(name, detail)
            elif name == "anchor":
                af = AsFound(detail["source"], int(detail["step_index"]), float(detail["v_rms"]),
                             float(detail["frequency_hz"]), str(detail["location"]), float(detail["emf_scale"]),
                             float(detail["frequency_offset_hz"]), int(ev["seq"]))
                self.anchors[af.source] = af
            elif name == "calibration":
                cal = SensorCalibration.from_detail(detail, int(ev["seq"]))
                self.calibrations[cal.sensor] = cal
        self.state_name = state
        self.session["state"] = state
        rows = self.archive.readings(self.session_id, latest_only=True)
        for r in rows.to_dict("records"):
            r = {k: _plain(v) for k, v in r.items()}
            parsed = ParsedReading(int(r["step_index"]), self._spec_index(r), str(r["quantity"]),
                                   str(r["location"]), float(r["measured"]), str(r["unit"]), str(r["entered"]),
                                   str(r["form"]), 1.0, float(r.get("meter_range") or math.nan), "",
                                   str(r["obtained"]), str(r.get("sensor") or ""), str(r.get("capture_id") or ""))
            role = "student" if str(r["recorded_by"]) in self.people else "ta"  # rows keep who, not the role
            self.entries.append(Entry(parsed, "recorded", Actor(str(r["recorded_by"]), role),
                                      note=str(r.get("note") or ""), reading_id=str(r["reading_id"]),
                                      revision=int(r["revision"]), reason=str(r.get("reason") or ""), row=r))

    def _spec_index(self, row: Mapping[str, Any]) -> int:
        step = self.template.steps[int(row["step_index"])]
        for j, spec in enumerate(step.readings):
            if spec.quantity == row["quantity"] and spec.location == row["location"]:
                return j
        return -1

    # -- properties ------------------------------------------------------------------------------------
    @property
    def session_id(self) -> str:
        """The session's id."""
        return str(self.session["session_id"])

    @property
    def bench(self) -> Bench:
        """The bench (cart values applied)."""
        return self.loaded_bench.bench

    @property
    def template(self) -> SessionTemplate:
        """The template."""
        return self.loaded_template.template

    @property
    def current(self) -> int:
        """Index of the current step."""
        return self._walk.current

    @property
    def skipped(self) -> dict[int, str]:
        """Skipped steps and their reasons."""
        return {k: v[0] for k, v in self._walk.skipped.items()}

    @property
    def people(self) -> list[str]:
        """Participant ids present."""
        return list(json.loads(self.session["people"]))

    # -- state machine ---------------------------------------------------------------------------------
    def transition(self, to: str, *, actor: Actor | None = None, reason: str = "") -> Mapping[str, Any]:
        """Move the session to ``to`` if the actor's role allows it (see :data:`TRANSITIONS`); an event."""
        who = actor or self.actor
        if to not in STATES:
            msg = f'unknown session state "{to}": expected one of {", ".join(STATES)}'
            raise SessionError(msg)
        allowed = TRANSITIONS.get((self.state_name, to))
        if allowed is None:
            msg = f"a session cannot go from {self.state_name} to {to}"
            if self.state_name == "closed":
                msg += " (a closed session takes only staff corrections with a reason)"
            raise SessionError(msg)
        if who.role not in allowed:
            msg = (f"{who.id} ({who.role}) may not move a session from {self.state_name} to {to}; "
                   f"allowed: {', '.join(sorted(allowed))}")
            raise SessionError(msg)
        event = self._event(f"state:{to}", who, detail={"from": self.state_name, "reason": reason} if reason
                            else {"from": self.state_name})
        self.state_name = to
        self.session["state"] = to
        return event

    def open(self, actor: Actor | None = None) -> Mapping[str, Any]:
        """planned -> open."""
        return self.transition("open", actor=actor)

    def submit(self, actor: Actor | None = None) -> Mapping[str, Any]:
        """open -> submitted."""
        return self.transition("submitted", actor=actor)

    def close(self, actor: Actor | None = None) -> Mapping[str, Any]:
        """submitted (or, for an instructor, open) -> closed."""
        return self.transition("closed", actor=actor)

    def reopen(self, reason: str, actor: Actor | None = None) -> Mapping[str, Any]:
        """submitted -> open, returned to the group for more readings (staff)."""
        return self.transition("open", actor=actor, reason=reason)

    def _require_open(self, who: Actor, what: str) -> None:
        if self.state_name != "open":
            hint = {"planned": "open the session first", "submitted": "staff can reopen it",
                    "closed": "a closed session takes only staff corrections with a reason"}[self.state_name]
            msg = f"cannot {what}: the session is {self.state_name} ({hint})"
            raise SessionError(msg)
        if who.role == "student" and who.id not in self.people:
            msg = f"{who.id} is not among the people present in this session ({', '.join(self.people)})"
            raise SessionError(msg)

    # -- steps -----------------------------------------------------------------------------------------
    def forward(self, actor: Actor | None = None) -> StepView:
        """Perform the current step and go to the next one (an event)."""
        return self._move("step:forward", self.current + 1, actor)

    def back(self, actor: Actor | None = None) -> StepView:
        """Go back one step (an event)."""
        return self._move("step:back", self.current - 1, actor)

    def skip(self, reason: str, *, applied: bool = False, actor: Actor | None = None) -> StepView:
        """Skip the current step with a reason (an event); its changes are not made unless ``applied``."""
        if not reason.strip():
            msg = "a skip needs a reason"
            raise SessionError(msg)
        return self._move("step:skip", self.current + 1, actor, reason=reason, applied=applied)

    def _move(self, event: str, to: int, actor: Actor | None, reason: str = "", applied: bool = False) -> StepView:
        who = actor or self.actor
        self._require_open(who, "move between steps")
        last = len(self.template.steps) - 1
        if not 0 <= to <= last:
            where = "the last" if to > last else "the first"
            msg = f"step {self.current} is {where} step; cannot move to {to}"
            raise SessionError(msg)
        detail: dict[str, Any] = {"from": self.current, "to": to}
        if event == "step:skip":
            detail |= {"reason": reason, "applied": applied}
        self._event(event, who, step_id=self.template.steps[self.current].id, detail=detail)
        self._apply_move(event, detail)
        return self.view()

    def _apply_move(self, event: str, detail: Mapping[str, Any]) -> None:
        start = int(detail["from"])
        if event == "step:skip":
            self._walk.skipped[start] = (str(detail["reason"]), bool(detail.get("applied", False)))
        elif event == "step:forward":
            self._walk.skipped.pop(start, None)  # going forward from a step performs it
        self._walk.current = int(detail["to"])

    # -- bench state and predictions -------------------------------------------------------------------
    def plain_states(self) -> list[BenchState]:
        """The state after each step with skipped steps left out, before any as-found values."""
        state = initial_state(self.bench)
        out = []
        for i, step in enumerate(self.template.steps):
            skip = self._walk.skipped.get(i)
            if skip is None or skip[1]:
                state = apply_step(self.bench, state, step)
            out.append(state)
        return out

    def state_at(self, index: int) -> BenchState:
        """The bench state after step ``index``, with the as-found values recorded at earlier steps."""
        return self._anchored(self.plain_states()[index], index)

    def _anchored(self, state: BenchState, index: int) -> BenchState:
        settings: dict[str, SourceSetting] = {}
        for af in self.anchors.values():
            if af.step_index >= index or af.source not in state.started:
                continue
            src = self.bench.source(af.source)
            old = state.setting(af.source)
            if isinstance(src, MainsReference):
                f = af.frequency_hz
                new = replace(old, frequency_hz=f)
            else:
                sp = (old.setpoint_hz or src.speed_control.setpoint_default) + af.frequency_offset_hz
                f = sp
                new = replace(old, setpoint_hz=sp)
            model = source_emf(self.bench, state.with_changes(settings={af.source: replace(new, emf_v=None)}),
                               af.source, f)
            settings[af.source] = replace(new, emf_v=model * af.emf_scale)
        return state.with_changes(settings=settings) if settings else state

    def anchor_label(self, index: int) -> str:
        """``nominal`` or the as-found values the predictions of step ``index`` use."""
        labels = [af.label for af in self.anchors.values() if af.step_index < index]
        return "; ".join(labels) if labels else "nominal"

    def view(self, index: int | None = None) -> StepView:
        """The current (or given) step with its prediction, expected readings, cautions, sync and frequency."""
        i = self.current if index is None else int(index)
        if not 0 <= i < len(self.template.steps):
            msg = f"step index {i} out of range 0..{len(self.template.steps) - 1}"
            raise UnknownNameError(msg)
        state = self.state_at(i)
        before = self.state_at(i - 1) if i > 0 else initial_state(self.bench)
        key = (i, state, before)
        if key not in self._views:
            self._views[key] = self._build_view(i, before, state)
        v = self._views[key]
        v.skipped = self.skipped.get(i, "")
        v.anchor = self.anchor_label(i)
        return v

    def _build_view(self, i: int, before: BenchState, state: BenchState) -> StepView:
        step = self.template.steps[i]
        bench = self.bench
        pred: Prediction | None = None
        error = ""
        try:
            pred = predict_state(bench, state, n_samples=self.n_samples, seed=self.seed)
        except NetworkError as exc:
            error = str(exc)
        sync = None
        if pred is not None and step.kind == "synchronize":
            sync = self._sync(step, before, state, pred)
        if pred is not None:
            for mid in intermediate_states(before, state):
                try:
                    mid_pred = predict_state(bench, mid, n_samples=min(self.n_samples, 200), seed=self.seed)
                except NetworkError as exc:
                    pred.rating_flags.append(f"an intermediate switching state cannot be solved: {exc}")
                    continue
                pred.rating_flags += [f"{flag} while switching" for flag in mid_pred.rating_flags
                                      if f"{flag} while switching" not in pred.rating_flags]
        expected = []
        for j, spec in enumerate(step.readings):
            unit = quantity(spec.quantity).unit
            sensor = self._sensor_for(spec)
            if pred is None:
                expected.append(ExpectedReading(j, spec, math.nan, math.nan, math.nan, unit, sensor, error))
                continue
            try:
                value, low, high = pred.reading(spec.location, spec.quantity, spec.sensor)
            except KeyError:
                expected.append(ExpectedReading(j, spec, math.nan, math.nan, math.nan, unit, sensor,
                                                "no prediction at this location"))
                continue
            expected.append(ExpectedReading(j, spec, value, low, high, unit, sensor))
        frequency = None
        if pred is not None and step.kind == "load_step":
            frequency = self._frequency_outlook(before, state, pred)
        cautions = step_cautions(bench, step, state, pred.rating_flags if pred else [])
        return StepView(i, step, state, pred, error, expected, cautions, list(pred.warnings) if pred else [],
                        self.anchor_label(i), sync=sync, frequency=frequency)

    def _sensor_for(self, spec: ReadingSpec) -> str:
        kind = "current" if "@" in spec.location else "voltage"
        s = sensor_at(self.bench, spec.location, kind, spec.sensor)
        return s.id if s else ""

    def _sync(self, step: Any, before: BenchState, state: BenchState, pred: Prediction) -> SyncPrediction | None:
        """The closing prediction between the incoming and running sides just before the switch closes."""
        from labkit.core.sync import SideState, limit_set, predict_sync

        bench = self.bench
        sw = bench.switch(step.switch)
        pre = state.with_changes(switches={step.switch: before.switch_closed(step.switch)})
        try:
            pre_pred = predict_state(bench, pre, n_samples=self.n_samples, seed=self.seed, harmonics=False)
        except NetworkError as exc:
            pred.warnings.append(f"the state before closing cannot be solved: {exc}")
            return None
        pred.merge_rows(pre_pred, {step.switch}, "before closing")
        try:
            sides = [SideState(pre_pred.value(b, "v_rms"), pre_pred.value(b, "frequency"))
                     for b in (sw.from_bus, sw.to_bus)]
        except (KeyError, LabkitError) as exc:
            pred.warnings.append(f"no sync prediction: a side of {sw.id} is not energized ({exc})")
            return None
        src = bench.source(step.source)
        limits = limit_set(step.limits, sync_limits=bench.bench.sync_limits, bench_id=bench.bench.id,
                           rating_kva=src.rating / 1000.0)
        field_setting = state.setting(src.id).field if isinstance(src, AlternatorSet) else None
        return predict_sync(sides[0], sides[1], limits, closing_time_s=sw.closing_time,
                            v_nominal=bench.bench.nominal_voltage, incoming_name=src.id,
                            field_setting=field_setting or (src.field_default if isinstance(src, AlternatorSet)
                                                            else None))

    def _frequency_outlook(self, before: BenchState, state: BenchState, pred: Prediction) -> FrequencyOutlook | None:
        """Frequency after a load step where alternator sets run (labkit.core.frequency)."""
        from labkit.core.frequency import DriveSet, DroopSource, ExponentLoad, share_load_change, simulate_load_step

        bench = self.bench
        roles = {r.source_id: r.role for r in pred.network.sources}
        sets = [bench.source(s) for s in roles if isinstance(bench.source(s), AlternatorSet)]
        if not sets:
            return None
        try:
            pre = predict_state(bench, before, n_samples=0, seed=self.seed, harmonics=False)
        except NetworkError:
            return None

        def delivered(p: Prediction) -> float:
            total = 0.0
            for r in p.network.sources:
                src = bench.source(r.source_id)
                try:
                    total += -p.value(f"{src.id}@{src.bus}", "p")
                except KeyError:
                    continue
            return total

        d_p = delivered(pred) - delivered(pre)
        drives = [DriveSet.from_alternator_set(s) for s in sets]
        f0 = pre.value(sets[0].bus, "frequency") if sets[0].bus in pre.network.bus_node else pred.value(
            sets[0].bus, "frequency")
        lines: list[str] = []
        values: dict[str, float] = {}
        try:
            if "slack" in roles.values():
                share = share_load_change(d_p, [DroopSource.from_drive(d) for d in drives], f0, infinite_bus=True)
                lines.append(f"the mains reference holds the frequency: it takes the whole {d_p:+.1f} W change; "
                             "the paralleled sets keep their droop power")
                values["frequency"] = f0
            elif len(drives) == 1 and roles[sets[0].id] == "island_frequency":
                setpoint = state.setting(sets[0].id).setpoint_hz or sets[0].speed_control.setpoint_default
                f1 = pred.value(sets[0].bus, "frequency")
                p0, p1 = delivered(pre), delivered(pred)
                resp = simulate_load_step(drives[0], setpoint, ExponentLoad(max(p0, 0.0), 2.0, f0),
                                          ExponentLoad(max(p1, 0.0), 2.0, f1), 5.0, n_points=801)
                share = share_load_change(d_p, [DroopSource.from_drive(drives[0])], f0)
                values |= {"frequency": resp.f_final_hz, **resp.metrics()}
                lines.append(f"{sets[0].id} alone: {f0:.3f} Hz -> {resp.f_final_hz:.3f} Hz, nadir "
                             f"{resp.nadir_hz:.3f} Hz, settles in {resp.settling_time_s:.2f} s")
            else:
                share = share_load_change(d_p, [DroopSource.from_drive(d) for d in drives], f0)
                values["frequency"] = share.frequency_hz
                lines.append(f"droop sharing: {f0:.3f} Hz -> {share.frequency_hz:.3f} Hz")
        except LabkitError as exc:
            return FrequencyOutlook(d_p, {}, {}, [f"no frequency prediction: {exc}"])
        lines += [f"{name} picks up {w:+.1f} W" for name, w in share.shares_w.items()]
        return FrequencyOutlook(d_p, values, dict(share.shares_w), lines)

    # -- as-found source values ------------------------------------------------------------------------
    def set_as_found(self, voltage: str | float, frequency: str | float, *, location: str | None = None,
                     capture_id: str = "", actor: Actor | None = None) -> AsFound:
        """Record the as-found voltage and frequency of the current source_start step's source (an event).

        Parameters
        ----------
        voltage, frequency
            Typed with units (``"118.6 V"``, ``"59.98 Hz"``) or numbers in V and Hz (from a capture).
        location
            Where the voltage was read; default the step's first ``v_rms`` reading, else the source's bus.
        """
        who = actor or self.actor
        self._require_open(who, "record as-found values")
        step = self.template.steps[self.current]
        if step.kind != "source_start":
            msg = f'as-found source values are recorded at a source_start step; step "{step.id}" is {step.kind}'
            raise SessionError(msg)
        v = float(voltage) if isinstance(voltage, int | float) else parse_quantity(
            voltage, "voltage", decimal_comma=self.decimal_comma)
        f = float(frequency) if isinstance(frequency, int | float) else parse_quantity(
            frequency, "frequency", decimal_comma=self.decimal_comma)
        src = self.bench.source(step.source)
        loc = location or next((r.location for r in step.readings if r.quantity == "v_rms"), src.bus)
        plain = self.plain_states()[self.current]
        old = plain.setting(src.id)
        if isinstance(src, MainsReference):
            trial = replace(old, frequency_hz=f)
            offset = 0.0
        else:
            nominal = predict_state(self.bench, plain, n_samples=0, harmonics=False)
            offset = f - nominal.value(loc, "frequency")
            trial = replace(old, setpoint_hz=(old.setpoint_hz or src.speed_control.setpoint_default) + offset)
        probe = predict_state(self.bench, plain.with_changes(settings={src.id: trial}), n_samples=0, harmonics=False)
        v_pred = probe.value(loc, "v_rms")
        if not v_pred > 0:
            msg = f"{loc} is not energized at step {step.id}: no as-found voltage can be read there"
            raise SessionError(msg)
        detail = {"source": src.id, "step_index": self.current, "v_rms": v, "frequency_hz": f, "location": loc,
                  "emf_scale": v / v_pred, "frequency_offset_hz": offset, "capture_id": capture_id}
        ev = self._event("anchor", who, step_id=step.id, detail=detail)
        af = AsFound(src.id, self.current, v, f, loc, v / v_pred, offset, int(ev.get("seq", -1)))
        self.anchors[src.id] = af
        return af

    def as_found_from_analysis(self, analysis: WaveformAnalysis, *, location: str | None = None,
                               capture_id: str = "", actor: Actor | None = None) -> AsFound:
        """:meth:`set_as_found` with the voltage (first channel's RMS) and frequency of a capture analysis."""
        return self.set_as_found(float(analysis.rms[0]), float(analysis.frequency), location=location,
                                 capture_id=capture_id, actor=actor)

    # -- entering readings -----------------------------------------------------------------------------
    def parse(self, spec_index: int, text: str, *, form: str = "rms", meter_range: str | None = None) -> ParsedReading:
        """Parse a typed reading of the current step (echo it; it counts only once :meth:`record` commits it)."""
        view = self.view()
        spec = self._spec(view, spec_index)
        return parse_typed(text, spec, step_index=view.index, spec_index=spec_index, form=form,
                           prediction=view.prediction, meter_range=meter_range, decimal_comma=self.decimal_comma)

    def from_analysis(self, spec_index: int, analysis: WaveformAnalysis, *, capture_id: str = "",
                      obtained: str = "capture") -> ParsedReading:
        """A reading of the current step taken from a capture analysis."""
        view = self.view()
        spec = self._spec(view, spec_index)
        value = value_from_analysis(analysis, spec.quantity, spec.location)
        unit = quantity(spec.quantity).unit
        summary = f"capture: {analysis.cycles} cycles at {analysis.frequency:.4f} Hz"
        return ParsedReading(view.index, spec_index, spec.quantity, spec.location, value, unit, summary, "rms", 1.0,
                             math.nan, f"{spec.quantity} at {spec.location}: {value:.5g} {unit} (from the capture)",
                             obtained, self._sensor_for(spec), capture_id)

    def from_capture(self, spec_index: int, capture: Capture, *, store: bool = True,
                     obtained: str = "capture") -> ParsedReading:
        """A reading from a capture (voltage channel first, then current), stored in the archive with it."""
        import io

        capture_id = ""
        if store:
            buf = io.BytesIO()
            np.savez_compressed(buf, data=capture.data, sample_rate=capture.sample_rate,
                                channels=np.array(capture.channels))
            capture_id = self.archive.store_capture(self.session_id, f"step{self.current}-r{spec_index}.npz",
                                                    buf.getvalue())
        # the stored capture is as taken; the stored calibrations of its sensors correct it before the analysis
        spec = self._spec(self.view(), spec_index)
        corrected, notes = corrected_capture(capture, channels_for(self.bench, spec), self.calibrations)
        parsed = self.from_analysis(spec_index, analyse_for(corrected), capture_id=capture_id, obtained=obtained)
        parsed.notes.extend(notes)
        if notes:
            parsed.echo += " (calibrated)"
        return parsed

    def simulate(self, spec_index: int, *, seed: int | None = None, faults: dict[str, ChannelFault] | None = None,
                 snr_db: float = 50.0, gain_error: float = 0.002, store: bool = False) -> ParsedReading:
        """A reading of the current step from the simulated bench (a synthesized capture, seeded).

        Quantities a capture does not give (slip, loading, ...) are the prediction's nominal value with
        seeded noise of ``gain_error`` relative size.
        """
        view = self.view()
        spec = self._spec(view, spec_index)
        if view.prediction is None:
            msg = f"step {view.step.id} has no prediction to simulate from: {view.error}"
            raise ReadingError(msg)
        s = self.seed * 1000 + view.index * 37 + spec_index if seed is None else seed
        if view.step.kind == "calibration":
            return self._simulate_calibration(view, spec_index, seed=s, snr_db=snr_db, store=store)
        try:
            cap = simulated_capture(view.prediction, self.bench, spec, seed=s, snr_db=snr_db, gain_error=gain_error,
                                    faults=faults, sensor_gain_errors=self.simulated_sensor_errors())
            parsed = self.from_capture(spec_index, cap, store=store, obtained="simulated")
        except ReadingError:
            exp = view.expected[spec_index]
            if not math.isfinite(exp.predicted):
                raise
            rng = np.random.default_rng(s)
            value = exp.predicted * (1.0 + gain_error * rng.standard_normal())
            parsed = ParsedReading(view.index, spec_index, spec.quantity, spec.location, float(value), exp.unit,
                                   "simulated bench", "rms", 1.0, math.nan,
                                   f"{spec.quantity} at {spec.location}: {value:.5g} {exp.unit} (simulated)",
                                   "simulated", exp.sensor)
        return parsed

    def _spec(self, view: StepView, spec_index: int) -> ReadingSpec:
        readings = view.step.readings
        if not 0 <= spec_index < len(readings):
            msg = f"step {view.step.id} has readings 0..{len(readings) - 1}; no reading {spec_index}"
            raise UnknownNameError(msg)
        return readings[spec_index]

    # -- calibration steps -----------------------------------------------------------------------------
    def calibrate(self, step_index: int, data: Capture | WaveformAnalysis, reference: str | float, *,
                  meter_id: str | None = None, accuracy_reading: str | float | None = None,
                  accuracy_full_scale: str | float | None = None, meter_range: str | float | None = None,
                  spec_index: int | None = None, channel: str | int | None = None,
                  skew_channel: str | int | None = None, expected_phase_deg: float = 0.0, store: bool = True,
                  actor: Actor | None = None, note: str = "") -> Mapping[str, Any]:
        """Calibrate the sensor of a calibration step against a reference meter and record it.

        Records a ``calibration`` event (sensor, meter id and accuracy, reference and measured values,
        corrections and their uncertainty; see :mod:`labkit.session.calibration`) and the step's reading
        row, judged against the reference value (band = reference +- the meter's accuracy, tolerance =
        the sensor's instrument tolerance), and returns the committed row. Later captures of the sensor
        through :meth:`from_capture` or :meth:`simulate` are corrected; :meth:`resume` re-applies the
        corrections from the event.

        Parameters
        ----------
        step_index
            The current step, of kind ``calibration``.
        data
            The sensor's capture (physical units; the channel at ``sensor:ID``, the only one of the
            sensor's kind, or ``channel``), or its analysis (gain and offset only).
        reference
            The reference meter's true-RMS reading with its unit (``"120.43 V"``), or a number in V or A.
        meter_id, accuracy_reading, accuracy_full_scale, meter_range
            The meter used, if not the template's (accuracies ``"0.1 %"`` or fractions; range ``"200 V"``).
        spec_index
            The step's reading to record (default: its ``v_rms`` or ``i_rms`` reading).
        skew_channel, expected_phase_deg
            A capture channel of known phase to the sensor's (default: found from a resistive load's
            current and its bus voltage, 0 deg; else the skew is 0 with a note).
        store
            Store the capture in the archive with the reading.

        Raises
        ------
        CalibrationError
            An absurd correction (gain more than 20 % off, ...): nothing is recorded.
        """
        who = actor or self.actor
        self._require_open(who, "calibrate a sensor")
        parsed = self.prepare_calibration(step_index, data, reference, meter_id=meter_id,
                                          accuracy_reading=accuracy_reading, accuracy_full_scale=accuracy_full_scale,
                                          meter_range=meter_range, spec_index=spec_index, channel=channel,
                                          skew_channel=skew_channel, expected_phase_deg=expected_phase_deg,
                                          store=store)
        return self.record(parsed, actor=who, note=note)

    def prepare_calibration(self, step_index: int, data: Capture | WaveformAnalysis, reference: str | float, *,
                            meter_id: str | None = None, accuracy_reading: str | float | None = None,
                            accuracy_full_scale: str | float | None = None, meter_range: str | float | None = None,
                            spec_index: int | None = None, channel: str | int | None = None,
                            skew_channel: str | int | None = None, expected_phase_deg: float = 0.0,
                            store: bool = True, obtained: str = "capture") -> ParsedReading:
        """The calibration reading of :meth:`calibrate`, computed but not recorded (:meth:`record` records it)."""
        from labkit.captures.capture import Capture as CaptureType

        view = self.view()
        step = view.step
        if int(step_index) != view.index:
            msg = f"a calibration is taken at the current step ({view.index}, {step.id}), not at step {step_index}"
            raise SessionError(msg)
        if step.kind != "calibration":
            msg = f'step "{step.id}" is {step.kind}: sensors are calibrated at a calibration step'
            raise SessionError(msg)
        sensor = self.bench.sensor(step.sensor)
        qname = QUANTITY_OF_KIND[sensor.kind]
        if spec_index is None:
            spec_index = next((j for j, r in enumerate(step.readings) if r.quantity == qname), -1)
            if spec_index < 0:
                msg = f'calibration step "{step.id}" lists no {qname} reading of sensor {sensor.id} to record'
                raise CalibrationError(msg)
        spec = self._spec(view, spec_index)
        if spec.quantity != qname:
            msg = (f"reading {spec_index} of step {step.id} is {spec.quantity}; a {sensor.kind} sensor is calibrated "
                   f"by its {qname}")
            raise CalibrationError(msg)
        meter = meter_use(step.reference_meter, qname, meter_id=meter_id, accuracy_reading=accuracy_reading,
                          accuracy_full_scale=accuracy_full_scale, meter_range=meter_range,
                          decimal_comma=self.decimal_comma)
        ref = reference_value(reference, qname, decimal_comma=self.decimal_comma)
        reading = meter.reading(ref)
        corr = compute_corrections(data, self.bench, sensor, reading, channel=channel, skew_channel=skew_channel,
                                   expected_phase_deg=expected_phase_deg)  # refuses an absurd one: nothing stored
        capture_id = ""
        if store and isinstance(data, CaptureType):
            capture_id = self._store_capture(data, spec_index)
        unit = quantity(qname).unit
        ref_text = reference if isinstance(reference, str) else f"{ref:.6g} {unit}"
        cal = SensorCalibration(
            sensor.id, sensor.kind, qname, unit, view.index, spec_index, corr.channel, corr.location or spec.location,
            ref, str(ref_text).strip(), corr.measured, meter.meter_id, meter.accuracy_reading,
            meter.accuracy_full_scale, meter.range, reading.uncertainty, corr.gain, corr.offset, corr.delay_s,
            reading.uncertainty / ref, obtained, capture_id, corr.notes)
        echo = (f"{qname} at {spec.location}: sensor {sensor.id} reads {corr.measured:.5g} {unit}, reference "
                f"{ref:.6g} +- {reading.uncertainty:.3g} {unit} ({meter.meter_id}) -> {cal.summary}")
        return ParsedReading(view.index, spec_index, qname, spec.location, corr.measured, unit,
                             f"{corr.channel} against reference {cal.reference_text}", "rms", 1.0, math.nan, echo,
                             obtained, sensor.id, capture_id, list(corr.notes), calibration=cal)

    def simulated_sensor_errors(self) -> dict[str, float]:
        """The simulated bench's own gain error of each sensor the template calibrates (seeded; invented demo data)."""
        return {step.sensor: seeded_gain_error(self.seed, step.sensor)
                for step in self.template.steps if step.kind == "calibration"}

    def _simulate_calibration(self, view: StepView, spec_index: int, *, seed: int, snr_db: float,
                              store: bool) -> ParsedReading:
        """A calibration on the simulated bench: the sensor (with its seeded gain error) and the reference meter."""
        from labkit.captures.simulate import ChannelSpec, SimulatedBench

        step, pred = view.step, view.prediction
        if pred is None:
            msg = f"step {step.id} has no prediction to simulate from: {view.error}"
            raise ReadingError(msg)
        sensor = self.bench.sensor(step.sensor)
        qname = QUANTITY_OF_KIND[sensor.kind]
        signal = "v" if sensor.kind == "voltage" else "i"
        for placement in sensor.placements:
            loc = placement.location
            if sensor.kind == "current" and "@" not in loc:
                continue
            orders, phasors = location_spectrum(pred, loc, signal, sensor.id)
            true_rms = float(np.sqrt(np.sum(np.abs(phasors) ** 2)))
            if true_rms > 0:
                break
        else:
            msg = f"sensor {sensor.id} has no energized placement at step {step.id}: nothing to calibrate against"
            raise ReadingError(msg)
        sol = pred.solution
        node = sol.network.bus_node.get(loc.partition("@")[2] if "@" in loc else loc)
        frequency = float(sol.island_frequency_hz[0, node]) if node is not None else float(sol.network.frequency_hz)
        rng = np.random.default_rng(seed)
        sample_rate = 10_000.0
        meter = meter_use(step.reference_meter, qname)
        # the reference meter reads the true value within half its accuracy, shown to 5 digits
        shown = true_rms + 0.5 * meter.uncertainty(true_rms) * rng.uniform(-1.0, 1.0)
        spectrum = tuple((int(h), complex(x)) for h, x in zip(orders, phasors, strict=True)
                         if h * frequency < 0.45 * sample_rate)
        spec = ChannelSpec(spectrum, kind=sensor.kind, location=loc, snr_db=snr_db,
                           gain_error=seeded_gain_error(self.seed, sensor.id))
        cap = SimulatedBench({f"{signal}@{loc}": spec}, sample_rate=sample_rate, frequency=frequency,
                             samples=round(12 * sample_rate / frequency), seed=int(rng.integers(0, 2**31))).capture()
        return self.prepare_calibration(view.index, cap, f"{shown:.5g} {quantity(qname).unit}",
                                        spec_index=spec_index, store=store, obtained="simulated")

    def _commit_calibration(self, parsed: ParsedReading, who: Actor) -> None:
        """The ``calibration`` event of a calibration reading; its corrections apply from now on."""
        cal = parsed.calibration
        if cal is None:
            return
        if cal.step_index != self.current:
            msg = f"a calibration of step {cal.step_index} is recorded at that step; the session is at {self.current}"
            raise SessionError(msg)
        ev = self._event("calibration", who, step_id=self.template.steps[cal.step_index].id, detail=cal.detail())
        cal = replace(cal, seq=int(ev.get("seq", -1)))
        self.calibrations[cal.sensor] = cal
        parsed.calibration = cal

    def _calibration_of(self, parsed: ParsedReading) -> SensorCalibration | None:
        """The calibration a reading row of a calibration step is judged by (its own, or the step's last)."""
        if parsed.calibration is not None:
            return parsed.calibration
        step = self.template.steps[parsed.step_index]
        if step.kind != "calibration":
            return None
        cal = self.calibrations.get(step.sensor)
        return cal if cal is not None and (cal.step_index, cal.spec_index) == (parsed.step_index,
                                                                                parsed.spec_index) else None

    def _calibration_tolerance(self, spec: ReadingSpec, parsed: ParsedReading,
                               cal: SensorCalibration) -> tuple[float, str]:
        """The tolerance of a calibration reading: the template's, or the calibrated sensor's instrument accuracy."""
        given = template_tolerance(spec.tolerance, spec.quantity, cal.reference_value)
        if given is not None:
            return given, "template tolerance"
        sensor = self.bench.sensor(cal.sensor)
        return (instrument_tolerance(sensor.accuracy, parsed.value, float(sensor.range)),
                f"instrument: sensor {sensor.id}")

    def _store_capture(self, capture: Capture, spec_index: int) -> str:
        """Store a capture's samples with the session (npz); its id."""
        import io

        buf = io.BytesIO()
        np.savez_compressed(buf, data=capture.data, sample_rate=capture.sample_rate,
                            channels=np.array(capture.channels))
        return self.archive.store_capture(self.session_id, f"step{self.current}-r{spec_index}.npz", buf.getvalue())

    # -- recording -------------------------------------------------------------------------------------
    def record(self, parsed: ParsedReading, *, meter: Meter | None = None, actor: Actor | None = None,
               note: str = "") -> Mapping[str, Any]:
        """Commit a parsed reading through the archive and return the committed row.

        On :class:`~labkit.logbook.storage.NotRecordedError` the entry stays in :attr:`entries` marked
        "not recorded" (see :meth:`retry`) and the error is raised again for the UI to show.
        """
        who = actor or self.actor
        self._require_open(who, "record a reading")
        if parsed.calibration is not None and parsed.calibration.seq < 0:
            self._commit_calibration(parsed, who)
        entry = Entry(parsed, "not recorded", who, meter, note, uuid.uuid4().hex, 0)
        return self._commit(entry)

    def correct(self, reading_id: str, parsed: ParsedReading, *, reason: str, meter: Meter | None = None,
                actor: Actor | None = None) -> Mapping[str, Any]:
        """Record a correction of a reading (a new revision with its reason).

        While the session is open anyone present may correct; once closed only staff (ta, instructor).
        """
        who = actor or self.actor
        if not reason.strip():
            msg = "a correction needs a reason"
            raise SessionError(msg)
        if self.state_name == "closed":
            if who.role not in STAFF:
                msg = f"{who.id} ({who.role}) cannot correct a closed session: only a ta or instructor can"
                raise SessionError(msg)
        else:
            self._require_open(who, "correct a reading")
        prior = [e for e in self.entries if e.reading_id == reading_id and e.status == "recorded"]
        if not prior:
            msg = f'no recorded reading "{reading_id}" in this session'
            raise UnknownNameError(msg)
        last = max(prior, key=lambda e: e.revision)
        entry = Entry(parsed, "not recorded", who, meter, last.note, reading_id, last.revision + 1, reason)
        return self._commit(entry)

    def retry(self, entry: Entry) -> Mapping[str, Any]:
        """Commit again an entry that was not recorded."""
        if entry.status != "not recorded":
            msg = "this entry is already recorded"
            raise SessionError(msg)
        if entry in self.entries:
            self.entries.remove(entry)
        return self._commit(entry)

    @property
    def not_recorded(self) -> list[Entry]:
        """Entries whose commit failed (still shown, marked "not recorded")."""
        return [e for e in self.entries if e.status == "not recorded"]

    def _commit(self, entry: Entry) -> Mapping[str, Any]:
        row = self.reading_row(entry)
        try:
            committed = self.archive.append_reading(row)
        except NotRecordedError as exc:
            entry.status, entry.error = "not recorded", str(exc)
            self.entries.append(entry)
            raise
        entry.status, entry.row, entry.error = "recorded", dict(committed), ""
        self.entries.append(entry)
        return committed

    def reading_row(self, entry: Entry) -> dict[str, Any]:
        """The reading row (``READING_COLUMNS`` less seq and recorded_at) of an entry, with its verdict."""
        p = entry.parsed
        view = self.view(p.step_index)
        step = view.step
        exp = view.expected[p.spec_index] if 0 <= p.spec_index < len(view.expected) else None
        spec = exp.spec if exp else None
        predicted, low, high = (exp.predicted, exp.band_low, exp.band_high) if exp else (math.nan,) * 3
        tol, tol_note = self.tolerance(spec, p, predicted, entry.meter) if spec else (math.nan, "")
        anchor = view.anchor
        cal = self._calibration_of(p)
        if cal is not None and spec is not None:
            # a calibration reading is judged against the reference meter, never against the model
            predicted, low, high = cal.reference_value, cal.reference_value - cal.uncertainty, \
                cal.reference_value + cal.uncertainty
            tol, tol_note = self._calibration_tolerance(spec, p, cal)
            tol_note = f"{tol_note}; judged against the {cal.label}; corrections {cal.summary}"
            anchor = cal.label
        result = verdict(p.value, low, high, tol, predicted=predicted, angle=p.quantity in ANGLE_QUANTITIES)
        row: dict[str, Any] = {
            "reading_id": entry.reading_id, "revision": entry.revision,
            "supersedes": entry.revision - 1 if entry.revision > 0 else -1,
            "session_id": self.session_id, "section": self.session["section"], "group": self.session["group"],
            "cart": self.session["cart"], "step_id": step.id, "step_index": view.index, "step_kind": step.kind,
            "location": p.location, "quantity": p.quantity, "unit": p.unit, "predicted": predicted,
            "band_low": low, "band_high": high, "tolerance": tol, "measured": p.value, "entered": p.entered,
            "form": p.form, "meter_range": p.meter_range, "obtained": p.obtained, "sensor": p.sensor,
            "verdict": result, "diagnosis": "", "diagnosis_code": "",
            "anchor": anchor, "capture_id": p.capture_id, "recorded_by": entry.actor.id,
            "reason": entry.reason, "note": "; ".join(x for x in (entry.note, tol_note, *p.notes) if x),
        }
        if cal is None:  # the model-based diagnosis does not apply to a reading judged against a reference meter
            row["diagnosis"], row["diagnosis_code"] = self._diagnose(row, view)
        return row

    def tolerance(self, spec: ReadingSpec, parsed: ParsedReading, predicted: float,
                  meter: Meter | None = None) -> tuple[float, str]:
        """The tolerance the verdict rule applies to a reading (registry unit) and a note on where it came from."""
        if not math.isfinite(predicted):
            return math.nan, ""
        given = template_tolerance(spec.tolerance, spec.quantity, predicted)
        if given is not None:
            return given, ""
        q = spec.quantity
        if meter is not None:
            fs = meter.range if math.isfinite(meter.range) else parsed.meter_range
            return instrument_tolerance(meter.accuracy, parsed.value, fs), f"instrument: {meter.name or 'meter'}"
        if q in VOLTAGE_MAGNITUDES or q in CURRENT_MAGNITUDES:
            kind = "voltage" if q in VOLTAGE_MAGNITUDES else "current"
            where = spec.location if kind == "current" or "@" not in spec.location else spec.location.partition("@")[2]
            sensor = sensor_at(self.bench, where, kind, spec.sensor if kind == "current" or "@" not in spec.location
                               else None)
            if sensor is None:
                return 0.0, "no instrument accuracy known: band only"
            fs = parsed.meter_range if math.isfinite(parsed.meter_range) else float(sensor.range)
            return instrument_tolerance(sensor.accuracy, parsed.value, fs), f"instrument: sensor {sensor.id}"
        if q in POWERS and "@" in spec.location:
            bus = spec.location.partition("@")[2]
            vs = sensor_at(self.bench, bus, "voltage")
            cs = sensor_at(self.bench, spec.location, "current", spec.sensor)
            view = self.view(parsed.step_index)
            if vs is None or cs is None or view.prediction is None:
                return 0.0, "no instrument accuracy known: band only"
            v = view.prediction.value(bus, "v_rms")
            i = view.prediction.value(spec.location, "i_rms")
            if not (v > 0 and i > 0):
                return 0.0, "no instrument accuracy known: band only"
            rel = (instrument_tolerance(vs.accuracy, v, float(vs.range)) / v
                   + instrument_tolerance(cs.accuracy, i, float(cs.range)) / i)
            return rel * abs(parsed.value), f"instrument: sensors {vs.id} and {cs.id} (worst case)"
        return 0.0, "no instrument accuracy for this quantity: band only"

    def _diagnose(self, row: Mapping[str, Any], view: StepView) -> tuple[str, str]:
        """The diagnosis of a reading that is not accepted, by :func:`labkit.session.diagnosis.diagnose`.

        The step's other latest readings go in with it (a reversed sensor or a wrong switch shows in
        several readings at once); the diagnosis of this reading is kept.
        """
        if row["verdict"] in ("accept", "unchecked") or view.prediction is None:
            return "", ""
        try:
            from labkit.session.diagnosis import Reading, diagnose
        except ImportError:  # the diagnosis module is optional for the runner
            return "", ""

        def as_reading(r: Mapping[str, Any]) -> Reading:
            rng = r.get("meter_range")
            tol = r.get("tolerance")
            return Reading(str(r["location"]), str(r["quantity"]), float(r["measured"]), str(r["form"]),
                           str(r.get("sensor") or "") or None,
                           float(rng) if rng is not None and math.isfinite(float(rng)) else None,
                           float(tol) if tol is not None and math.isfinite(float(tol)) else None)

        others = self.readings_frame()
        rows: list[Mapping[str, Any]] = []
        if not others.empty:
            same = others[(others["step_index"] == row["step_index"]) & (others["reading_id"] != row["reading_id"])]
            rows = [r for r in same.to_dict("records") if math.isfinite(float(r["measured"]))]
        readings = [as_reading(r) for r in rows] + [as_reading(row)]
        try:
            result = diagnose(self.bench, view.state, view.prediction, readings, budget_s=self.diagnosis_budget_s)
        except LabkitError as exc:
            return f"no diagnosis: {exc}", "unexplained"
        mine = next((d for d in result if d.reading == len(readings) - 1), None)
        if mine is None or mine.code == "none":
            return "", ""
        return mine.text, mine.code

    # -- tables ----------------------------------------------------------------------------------------
    def readings_frame(self) -> pd.DataFrame:
        """The session's latest reading rows as committed (one per reading id)."""
        rows = [e.row for e in self.entries if e.status == "recorded" and e.row is not None]
        if not rows:
            return pd.DataFrame()
        frame = pd.DataFrame(rows)
        frame = frame.sort_values(["reading_id", "revision"]).drop_duplicates("reading_id", keep="last")
        return frame.sort_values("seq") if "seq" in frame else frame

    # -- events ----------------------------------------------------------------------------------------
    def _event(self, name: str, who: Actor, *, step_id: str = "", detail: Mapping[str, Any] | None = None
               ) -> Mapping[str, Any]:
        return self.archive.append_event({"session_id": self.session_id, "by": who.id, "role": who.role,
                                          "event": name, "step_id": step_id,
                                          "detail": json.dumps(dict(detail or {}), sort_keys=True)})


def session_row(bench: LoadedBench, template: LoadedTemplate, *, section: str, group: str, people: Sequence[str],
                created_by: str, cart: str | None = None, kind: str = "lab", n_samples: int = DEFAULT_SAMPLES,
                seed: int = DEFAULT_SEED, session_id: str | None = None) -> dict[str, Any]:
    """A new session row (``SESSION_COLUMNS``), with the bench, cart and template texts and their hashes."""
    from labkit import __version__

    if kind not in SESSION_KINDS:
        msg = f'session kind "{kind}": expected one of {", ".join(SESSION_KINDS)}'
        raise SessionError(msg)
    for name, value in (("section", section), ("group", group)):
        if not str(value).strip():
            msg = f"a session needs a {name} id"
            raise SessionError(msg)
    b, t = bench.bench, template.template
    cart_id = cart or (b.cart.id if b.cart else "")
    if not cart_id:
        msg = "a session needs a cart id (give cart=..., or load the bench with its cart file)"
        raise SessionError(msg)
    return {
        "session_id": session_id or uuid.uuid4().hex, "kind": kind, "state": "planned", "section": section,
        "group": group, "cart": cart_id, "people": json.dumps(list(people)),
        "template_id": t.template.id, "template_version": t.template.version,
        "template_sha256": template.source.sha256, "template_text": template.source.text,
        "bench_id": b.bench.id, "bench_version": b.bench.version, "bench_sha256": bench.type_source.sha256,
        "bench_text": bench.type_source.text,
        "cart_sha256": bench.cart_source.sha256 if bench.cart_source else "",
        "cart_text": bench.cart_source.text if bench.cart_source else "",
        "labkit_version": __version__, "mc_seed": int(seed), "mc_samples": int(n_samples),
        "created_at": pd.Timestamp.now(tz="UTC"), "created_by": created_by,
    }


def _plain(value: Any) -> Any:
    """numpy and pandas scalars as plain Python values (NA as NaN or empty)."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return value
    if value is pd.NA or value is pd.NaT:
        return None
    if isinstance(value, np.generic):
        return value.item()
    return value
