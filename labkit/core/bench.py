"""The bench description: buses, sources, switches, line sections and branches, loads, sensors.

These are validated value objects (pydantic models) holding SI floats; they do
no I/O. :mod:`labkit.files.loader` reads a bench TOML file (and a per-cart
override file) into a :class:`Bench`, reporting every problem with its line.
``docs/bench-format.md`` documents every key with its unit.
"""

from __future__ import annotations

from typing import Annotated, Literal, TypeVar

from pydantic import BaseModel, Field, model_validator

from labkit.core.conventions import VoltageBasis
from labkit.core.fields import (
    STRICT,
    Angle,
    ApparentPower,
    Capacitance,
    Current,
    Frequency,
    Inductance,
    Length,
    Name,
    Percent,
    Resistance,
    Time,
    Tolerance,
    Voltage,
    located_error,
    quantity_field,
)

BENCH_FORMAT = 1

Ratio = quantity_field("ratio", minimum=0.0, maximum=5.0)


class Model(BaseModel):
    """Base of every file model: unknown keys are errors, instances are immutable."""

    model_config = STRICT


# -- header ---------------------------------------------------------------------------------
class SyncLimits(Model):
    """The bench's own synchronization limits (absolute values; incoming minus running)."""

    max_slip: quantity_field("frequency", positive=True, maximum=10.0)
    max_voltage_difference: Percent
    max_phase_difference: quantity_field("angle", positive=True, maximum=180.0)


class BenchHeader(Model):
    """``[bench]``: identity and nominal values of the bench type."""

    labkit_bench: Literal[1] = Field(description="file format version")
    id: Name
    version: str = Field(min_length=1, max_length=40)
    title: str = Field(min_length=1)
    scenario: str = Field(default="", description="where the bench comes from; demo files say they are invented")
    nominal_frequency: Frequency
    nominal_voltage: Voltage
    voltage_basis: VoltageBasis = VoltageBasis.SINGLE_PHASE
    sync_limits: SyncLimits | None = None


class Bus(Model):
    """``[[buses]]``: a node of the bench."""

    name: Name
    description: str = ""


# -- sources --------------------------------------------------------------------------------
class Transformer(Model):
    """The variable transformer of a mains-derived source: output = mains x ratio x tap."""

    ratio: Ratio = 1.0
    tap_min: Ratio = 0.0
    tap_max: Ratio = 1.0
    tap_default: Ratio = 1.0
    isolating: bool = Field(default=False, description="true only if an isolation transformer is fitted")

    @model_validator(mode="after")
    def _tap_order(self) -> Transformer:
        if not self.tap_min <= self.tap_default <= self.tap_max:
            msg = "expected tap_min <= tap_default <= tap_max"
            raise located_error(msg, "tap_default")
        return self


class SpeedControl(Model):
    """Speed loop of a motor-driven set: PI on shaft speed with a torque limit, droop or isochronous."""

    mode: Literal["droop", "isochronous"]
    droop: quantity_field("ratio", minimum=0.0, maximum=0.5) = 0.05
    kp: quantity_field("speed_gain", minimum=0.0)
    ki: quantity_field("rate_gain", minimum=0.0)
    torque_limit: quantity_field("torque", positive=True)
    setpoint_min: Frequency
    setpoint_max: Frequency
    setpoint_default: Frequency

    @model_validator(mode="after")
    def _setpoint_order(self) -> SpeedControl:
        if not self.setpoint_min <= self.setpoint_default <= self.setpoint_max:
            msg = "expected setpoint_min <= setpoint_default <= setpoint_max"
            raise located_error(msg, "setpoint_default")
        return self


class SourceBase(Model):
    id: Name
    bus: Name = Field(description="terminal bus of the source")
    description: str = ""
    rating: ApparentPower
    r_internal: Resistance
    l_internal: Inductance
    tolerance: Tolerance = 0.0


class MainsReference(SourceBase):
    """``kind = "mains_reference"``: the mains through a variable transformer; the slack of the bench."""

    kind: Literal["mains_reference"]
    mains_voltage: Voltage
    mains_frequency: Frequency
    transformer: Transformer = Transformer()


class AlternatorSet(SourceBase):
    """``kind = "alternator_set"``: a motor-driven alternator with frequency feedback control."""

    kind: Literal["alternator_set"]
    emf_rated: Voltage = Field(description="open-circuit EMF at rated frequency, field 1.0")
    rated_frequency: Frequency
    field_min: Ratio = 0.0
    field_max: Ratio = 1.2
    field_default: Ratio = 1.0
    x_subtransient: quantity_field("resistance", positive=True)
    pole_pairs: int = Field(ge=1, le=12)
    inertia: quantity_field("inertia", positive=True)
    speed_control: SpeedControl


Source = Annotated[MainsReference | AlternatorSet, Field(discriminator="kind")]


# -- switches and lines ----------------------------------------------------------------------
class Switch(Model):
    """``[[switches]]``: a switch between two buses (synchronizing switch, bus tie)."""

    id: Name
    from_bus: Name
    to_bus: Name
    closing_time: Time = 0.0
    rated_current: Current
    normally: Literal["open", "closed"] = "open"
    description: str = ""


class FullScaleLine(Model):
    """The full-scale line a bench section stands for, per unit length, scaled by the bench's bases."""

    length: Length
    r_per_length: quantity_field("resistance_per_length", minimum=0.0)
    l_per_length: quantity_field("inductance_per_length", positive=True)
    c_per_length: quantity_field("capacitance_per_length", minimum=0.0)
    g_per_length: quantity_field("conductance_per_length", minimum=0.0) = 0.0
    model: Literal["nominal_pi", "exact_pi"] = "exact_pi"


class LineSection(Model):
    """``[[line_sections]]``: one lumped pi section (series R + L, C/2 at each end)."""

    id: Name
    r: Resistance | None = None
    l: Inductance | None = None  # noqa: E741 - the trade's own letter
    c: Capacitance | None = None
    full_scale: FullScaleLine | None = None
    rated_current: Current
    tolerance: Tolerance = 0.0
    description: str = ""

    @model_validator(mode="after")
    def _one_way_of_giving_values(self) -> LineSection:
        given = [v is not None for v in (self.r, self.l, self.c)]
        if self.full_scale is not None and any(given):
            msg = "give either r, l and c or full_scale, not both"
            raise ValueError(msg)
        if self.full_scale is None and not all(given):
            msg = "expected r, l and c (or a full_scale table)"
            raise ValueError(msg)
        return self


class LineScaling(Model):
    """``[line_scaling]``: bases of the full-scale line and of the bench for per-unit scaling."""

    full_scale_voltage: Voltage
    full_scale_power: ApparentPower
    full_scale_frequency: Frequency
    bench_voltage: Voltage
    bench_power: ApparentPower


class LinePosition(Model):
    """A switch position of a line branch: parallel paths, each a series chain of sections."""

    name: Name
    paths: list[list[Name]] = Field(min_length=1)
    description: str = ""


class LineBranch(Model):
    """``[[line_branches]]``: sections that can be switched between two buses in set positions."""

    id: Name
    from_bus: Name
    to_bus: Name
    positions: list[LinePosition] = Field(min_length=1)
    default_position: str = "open"
    closing_time: Time = 0.0
    description: str = ""


# -- loads ----------------------------------------------------------------------------------
class LoadStep(Model):
    """One switch step of a load bank: its equivalent R, L, C combined in series or in parallel."""

    r: quantity_field("resistance", positive=True) | None = None
    l: quantity_field("inductance", positive=True) | None = None  # noqa: E741
    c: quantity_field("capacitance", positive=True) | None = None
    description: str = ""

    @model_validator(mode="after")
    def _something(self) -> LoadStep:
        if self.r is None and self.l is None and self.c is None:
            msg = "a load step needs at least one of r, l, c"
            raise ValueError(msg)
        return self


class Harmonic(Model):
    """One harmonic current of a nonlinear load, relative to its fundamental current."""

    order: int = Field(ge=2, le=63)
    magnitude: quantity_field("ratio", minimum=0.0, maximum=1.5)
    angle: Angle = 0.0


class LinearLoad(Model):
    """``kind`` resistive, inductive, capacitive or combined: a switched bank of R, L, C steps."""

    id: Name
    kind: Literal["resistive", "inductive", "capacitive", "combined"]
    bus: Name
    combination: Literal["series", "parallel"] = "parallel"
    steps: list[LoadStep] = Field(min_length=1)
    tolerance: Tolerance = 0.05
    rated_current: Current
    description: str = ""

    @model_validator(mode="after")
    def _kind_matches_steps(self) -> LinearLoad:
        needed = {"resistive": ("r",), "inductive": ("l",), "capacitive": ("c",)}.get(self.kind)
        if needed is None:
            return self
        for index, step in enumerate(self.steps):
            present = {k for k in ("r", "l", "c") if getattr(step, k) is not None}
            extra = present - set(needed) - ({"r"} if self.kind == "inductive" else set())
            if needed[0] not in present or extra:
                msg = (f"a {self.kind} load's steps give {needed[0]}"
                       + (" (and r for the coil's resistance)" if self.kind == "inductive" else "")
                       + '; use kind = "combined" for mixed steps')
                raise located_error(msg, "steps", index)
        return self


class NonlinearLoad(Model):
    """``kind = "nonlinear"``: a rectifier-type load given by its fundamental power and harmonic spectrum."""

    id: Name
    kind: Literal["nonlinear"]
    bus: Name
    rated_voltage: Voltage
    p1: quantity_field("active_power", positive=True)
    q1: quantity_field("reactive_power") = 0.0
    harmonics: list[Harmonic] = Field(default_factory=list)
    rated_current: Current
    tolerance: Tolerance = 0.05
    description: str = ""


Load = Annotated[LinearLoad | NonlinearLoad, Field(discriminator="kind")]


# -- sensors --------------------------------------------------------------------------------
class Accuracy(Model):
    """Meter or sensor accuracy: +-(reading % x |reading| + full-scale % x range + digits x resolution)."""

    reading: Percent = 0.0
    full_scale: Percent = 0.0
    digits: int = Field(default=0, ge=0, le=1000)
    resolution: float = Field(default=0.0, ge=0.0)


class Placement(Model):
    """Where a sensor can be placed; current sensors also give their reference direction."""

    location: str
    from_: str | None = Field(default=None, alias="from")
    to: str | None = None


class SensorBase(Model):
    id: Name
    channel: int = Field(ge=0, le=255)
    coupling: Literal["AC", "DC"] = "DC"
    accuracy: Accuracy = Accuracy()
    placements: list[Placement] = Field(min_length=1)
    description: str = ""


class VoltageSensor(SensorBase):
    """``kind = "voltage"``: a voltage channel; ``scale`` is the sensor's output (V) per measured volt."""

    kind: Literal["voltage"]
    scale: quantity_field("voltage_per_voltage", positive=True)
    range: Voltage


class CurrentSensor(SensorBase):
    """``kind = "current"``: a current channel; ``scale`` is the sensor's output (V) per measured ampere."""

    kind: Literal["current"]
    scale: quantity_field("voltage_per_current", positive=True)
    range: Current


Sensor = Annotated[VoltageSensor | CurrentSensor, Field(discriminator="kind")]


# -- the whole bench ------------------------------------------------------------------------
class Bench(Model):
    """A bench type, possibly with one cart's measured values applied."""

    bench: BenchHeader
    buses: list[Bus] = Field(min_length=1)
    sources: list[Source] = Field(min_length=1)
    switches: list[Switch] = Field(default_factory=list)
    line_sections: list[LineSection] = Field(default_factory=list)
    line_scaling: LineScaling | None = None
    line_branches: list[LineBranch] = Field(default_factory=list)
    loads: list[Load] = Field(default_factory=list)
    sensors: list[Sensor] = Field(default_factory=list)
    cart: CartInfo | None = None

    # lookups -----------------------------------------------------------------------------
    def source(self, source_id: str) -> MainsReference | AlternatorSet:
        """The source with this id."""
        return _by_id(self.sources, source_id, "source")

    def branch(self, branch_id: str) -> LineBranch:
        """The line branch with this id."""
        return _by_id(self.line_branches, branch_id, "line branch")

    def section(self, section_id: str) -> LineSection:
        """The line section with this id."""
        return _by_id(self.line_sections, section_id, "line section")

    def load(self, load_id: str) -> LinearLoad | NonlinearLoad:
        """The load with this id."""
        return _by_id(self.loads, load_id, "load")

    def switch(self, switch_id: str) -> Switch:
        """The switch with this id."""
        return _by_id(self.switches, switch_id, "switch")

    def sensor(self, sensor_id: str) -> VoltageSensor | CurrentSensor:
        """The sensor with this id."""
        return _by_id(self.sensors, sensor_id, "sensor")

    @property
    def bus_names(self) -> list[str]:
        """Bus names in file order (the node order of every solve)."""
        return [b.name for b in self.buses]

    def element_ids(self) -> dict[str, str]:
        """Every element id mapped to its table name."""
        out: dict[str, str] = {}
        for table in ("sources", "switches", "line_sections", "line_branches", "loads"):
            for item in getattr(self, table):
                out[item.id] = table
        return out


class CartInfo(Model):
    """The cart a bench was specialized to, from its override file."""

    id: Name
    bench_type: Name
    measured_on: str
    meter: str = ""
    note: str = ""


T = TypeVar("T")


def _by_id(items: list[T], item_id: str, what: str) -> T:
    for item in items:
        if getattr(item, "id", None) == item_id:
            return item
    from labkit.core.errors import UnknownNameError, did_you_mean

    ids = [str(getattr(i, "id", "")) for i in items]
    msg = f'no {what} "{item_id}" on this bench{did_you_mean(item_id, ids)}'
    raise UnknownNameError(msg)


Bench.model_rebuild()
