"""The bench's state after each step of a template: what is started, closed, connected and switched on.

A :class:`BenchState` is a small immutable value; :func:`states_after_steps`
walks a template and returns the state after every step, which is what each
step's predictions are computed for.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field, replace
from itertools import combinations

from labkit.core.bench import Bench, MainsReference
from labkit.core.template import SessionTemplate


@dataclass(frozen=True)
class SourceSetting:
    """Operator settings of a started source."""

    tap: float | None = None  # mains reference: variable-transformer tap
    field: float | None = None  # alternator set: field setting (1.0 gives emf_rated at rated frequency)
    setpoint_hz: float | None = None  # alternator set: speed-control frequency setpoint
    emf_v: float | None = None  # as-found EMF (measured open-circuit voltage), overrides the model
    frequency_hz: float | None = None  # as-found frequency of a mains reference


@dataclass(frozen=True)
class BenchState:
    """Discrete state of the bench: sources started, switch positions, line positions, load steps."""

    started: frozenset[str] = frozenset()
    settings: tuple[tuple[str, SourceSetting], ...] = ()
    switches: tuple[tuple[str, bool], ...] = ()  # switch id -> closed
    lines: tuple[tuple[str, str], ...] = ()  # branch id -> position name or "open"
    loads: tuple[tuple[str, int], ...] = ()  # load id -> step (0 off)
    notes: tuple[str, ...] = field(default=(), compare=False)

    # accessors --------------------------------------------------------------------------
    def setting(self, source_id: str) -> SourceSetting:
        """The settings of a source (defaults when none were given)."""
        return dict(self.settings).get(source_id, SourceSetting())

    def switch_closed(self, switch_id: str) -> bool:
        """True when the switch is closed."""
        return dict(self.switches).get(switch_id, False)

    def line_position(self, branch_id: str) -> str:
        """The position of a line branch ("open" when not connected)."""
        return dict(self.lines).get(branch_id, "open")

    def load_step(self, load_id: str) -> int:
        """The step of a load bank (0 is off)."""
        return dict(self.loads).get(load_id, 0)

    # changes ----------------------------------------------------------------------------
    def with_changes(self, *, started: set[str] | None = None, settings: dict[str, SourceSetting] | None = None,
                     switches: dict[str, bool] | None = None, lines: dict[str, str] | None = None,
                     loads: dict[str, int] | None = None) -> BenchState:
        """A new state with the given entries changed."""
        def merged(old: tuple[tuple[str, object], ...], new: dict | None) -> tuple:
            d = dict(old)
            d.update(new or {})
            return tuple(sorted(d.items()))

        return replace(
            self,
            started=self.started | frozenset(started or ()),
            settings=merged(self.settings, settings),
            switches=merged(self.switches, switches),
            lines=merged(self.lines, lines),
            loads=merged(self.loads, loads),
        )


def initial_state(bench: Bench) -> BenchState:
    """The bench before the first step: nothing started, switches and lines at their defaults."""
    return BenchState(
        switches=tuple(sorted((s.id, s.normally == "closed") for s in bench.switches)),
        lines=tuple(sorted((b.id, b.default_position) for b in bench.line_branches)),
        loads=tuple(sorted((ld.id, 0) for ld in bench.loads)),
    )


def apply_step(bench: Bench, state: BenchState, step: object) -> BenchState:
    """The state after one template step."""
    kind = getattr(step, "kind", "")
    if kind == "source_start":
        src = bench.source(step.source)  # type: ignore[attr-defined]
        if isinstance(src, MainsReference):
            setting = SourceSetting(tap=step.tap)  # type: ignore[attr-defined]
        else:
            setting = SourceSetting(field=step.field_setting,  # type: ignore[attr-defined]
                                    setpoint_hz=step.frequency_setpoint)  # type: ignore[attr-defined]
        return state.with_changes(started={src.id}, settings={src.id: setting},
                                  switches=dict.fromkeys(step.close, True))  # type: ignore[attr-defined]
    if kind == "synchronize":
        settings = {}
        if step.frequency_setpoint is not None or step.field_setting is not None:  # type: ignore[attr-defined]
            old = state.setting(step.source)  # type: ignore[attr-defined]
            settings[step.source] = replace(  # type: ignore[attr-defined]
                old, setpoint_hz=step.frequency_setpoint or old.setpoint_hz,  # type: ignore[attr-defined]
                field=step.field_setting or old.field)  # type: ignore[attr-defined]
        return state.with_changes(switches={step.switch: True}, settings=settings)  # type: ignore[attr-defined]
    if kind == "configure_lines":
        return state.with_changes(lines=dict(step.lines),  # type: ignore[attr-defined]
                                  switches={k: v == "closed" for k, v in step.switches.items()})  # type: ignore[attr-defined]
    if kind == "load_step":
        return state.with_changes(loads=dict(step.loads))  # type: ignore[attr-defined]
    if kind == "line_outage":
        return state.with_changes(lines={step.line: "open"})  # type: ignore[attr-defined]
    return state


def states_after_steps(bench: Bench, template: SessionTemplate) -> list[BenchState]:
    """The state after each step of the template, in order."""
    states = []
    state = initial_state(bench)
    for step in template.steps:
        state = apply_step(bench, state, step)
        states.append(state)
    return states


def intermediate_states(before: BenchState, after: BenchState, limit: int = 6) -> Iterator[BenchState]:
    """States passed through when a step's changes are made one at a time.

    With at most ``limit`` changed items every subset is produced (any order of
    switching passes only through these); beyond that, the prefixes in file order.
    """
    changes: list[tuple[str, str, object]] = []
    for attr in ("switches", "lines", "loads"):
        old, new = dict(getattr(before, attr)), dict(getattr(after, attr))
        changes += [(attr, k, v) for k, v in new.items() if old.get(k) != v]
    if len(changes) <= 1:
        return
    if len(changes) <= limit:
        subsets = [c for n in range(1, len(changes)) for c in combinations(changes, n)]
    else:
        subsets = [tuple(changes[:n]) for n in range(1, len(changes))]
    for subset in subsets:
        grouped: dict[str, dict] = {"switches": {}, "lines": {}, "loads": {}}
        for attr, key, value in subset:
            grouped[attr][key] = value
        yield replace(before, started=after.started, settings=after.settings).with_changes(**grouped)


def describe_state(bench: Bench, state: BenchState) -> list[str]:
    """Short lines describing a state, for reports and the CLI."""
    out = [f"started: {', '.join(sorted(state.started)) or 'none'}"]
    out.append("closed switches: " + (", ".join(k for k, v in state.switches if v) or "none"))
    out.append("lines: " + ", ".join(f"{k}={v}" for k, v in state.lines))
    on = [f"{k}={v}" for k, v in state.loads if v]
    out.append("loads on: " + (", ".join(on) or "none"))
    return out
