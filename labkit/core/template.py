"""The session template: the ordered steps of one lab, each with the readings to take.

Validated value objects (pydantic models); :mod:`labkit.files.loader` reads
them from TOML and checks them against a bench. ``docs/template-format.md``
documents every key.
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import BaseModel, Field, model_validator

from labkit.core.fields import STRICT, Frequency, Name, Percent, quantity_field

TEMPLATE_FORMAT = 1

STEP_KINDS = ("source_start", "synchronize", "configure_lines", "load_step", "line_outage",
              "calibration", "free_reading")


class Model(BaseModel):
    model_config = STRICT


class ReadingSpec(Model):
    """``[[steps.readings]]``: one reading to take in a step.

    ``tolerance`` is ``"2 %"`` (of the predicted value), an absolute value with
    the quantity's unit (``"0.5 V"``), or ``"instrument"`` (the sensor's or
    meter's accuracy).
    """

    quantity: str
    location: str
    unit: str
    tolerance: str = "instrument"
    sensor: Name | None = None
    note: str = ""


class ReferenceMeter(Model):
    """The reference meter a calibration step compares against."""

    id: str = Field(min_length=1)
    accuracy_reading: Percent = 0.0
    accuracy_full_scale: Percent = 0.0
    range: str = ""


class StepBase(Model):
    id: Name
    title: str = Field(min_length=1)
    instructions: str = ""
    cautions: list[str] = Field(default_factory=list)
    readings: list[ReadingSpec] = Field(default_factory=list)


class SourceStart(StepBase):
    """Start a source and switch it onto its bus (``close`` names the switch to close, if any)."""

    kind: Literal["source_start"]
    source: Name
    close: list[Name] = Field(default_factory=list)
    tap: quantity_field("ratio", minimum=0.0, maximum=5.0) | None = None
    field_setting: quantity_field("ratio", minimum=0.0, maximum=5.0) | None = None
    frequency_setpoint: Frequency | None = None


class Synchronize(StepBase):
    """Bring a started source into step with the running grid and close its switch."""

    kind: Literal["synchronize"]
    source: Name
    switch: Name
    limits: Literal["bench", "ieee1547", "generator_practice"] = "bench"
    frequency_setpoint: Frequency | None = None
    field_setting: quantity_field("ratio", minimum=0.0, maximum=5.0) | None = None


class ConfigureLines(StepBase):
    """Set line branches to named positions (or ``"open"``) and switches open or closed."""

    kind: Literal["configure_lines"]
    lines: dict[Name, Name] = Field(default_factory=dict)
    switches: dict[Name, Literal["open", "closed"]] = Field(default_factory=dict)

    @model_validator(mode="after")
    def _something(self) -> ConfigureLines:
        if not self.lines and not self.switches:
            msg = "a configure_lines step sets at least one line or switch"
            raise ValueError(msg)
        return self


class LoadChange(StepBase):
    """Set load banks to steps (0 is off, 1 the first step of the bank)."""

    kind: Literal["load_step"]
    loads: dict[Name, Annotated[int, Field(ge=0, le=64)]] = Field(min_length=1)


class LineOutage(StepBase):
    """Take a line branch out (its switch opened)."""

    kind: Literal["line_outage"]
    line: Name


class Calibration(StepBase):
    """Compare a sensor's capture with a reference meter reading; yields corrections."""

    kind: Literal["calibration"]
    sensor: Name
    reference_meter: ReferenceMeter


class FreeReading(StepBase):
    """Readings on the bench as it stands."""

    kind: Literal["free_reading"]


Step = Annotated[
    SourceStart | Synchronize | ConfigureLines | LoadChange | LineOutage | Calibration | FreeReading,
    Field(discriminator="kind"),
]


class Requirements(Model):
    """What a bench must have for this template."""

    sources: list[Name] = Field(default_factory=list)
    line_branches: list[Name] = Field(default_factory=list)
    loads: list[Name] = Field(default_factory=list)
    sensors: list[Name] = Field(default_factory=list)
    switches: list[Name] = Field(default_factory=list)


class TemplateHeader(Model):
    """``[template]``: identity and purpose of the lab."""

    labkit_template: Literal[1]
    id: Name
    version: str = Field(min_length=1, max_length=40)
    title: str = Field(min_length=1)
    scenario: str = ""
    objectives: list[str] = Field(default_factory=list)
    cautions: list[str] = Field(default_factory=list)
    bench_type: Name | None = None
    requires: Requirements = Requirements()


class SessionTemplate(Model):
    """A whole template: header and ordered steps."""

    template: TemplateHeader
    steps: list[Step] = Field(min_length=1)

    def step(self, key: str | int) -> Step:
        """A step by its id or its 0-based index (a numeric string counts as an index)."""
        from labkit.core.errors import UnknownNameError, did_you_mean

        if isinstance(key, int) or (isinstance(key, str) and key.isdigit()):
            index = int(key)
            if 0 <= index < len(self.steps):
                return self.steps[index]
            msg = f"step index {index} out of range 0..{len(self.steps) - 1}"
            raise UnknownNameError(msg)
        for s in self.steps:
            if s.id == key:
                return s
        msg = f'no step "{key}"{did_you_mean(key, [s.id for s in self.steps])}'
        raise UnknownNameError(msg)

    def index_of(self, step_id: str) -> int:
        """The 0-based index of a step id."""
        return [s.id for s in self.steps].index(step_id)
