"""Typed fields for the bench and template models: quantities with units, ids, ratios.

Each quantity field is an ``Annotated[float, ...]`` that parses ``"2.5 mH"``
through :func:`labkit.core.units.parse_quantity`, then checks the physical range,
and stores the SI float. The field's kind and range are kept as metadata
(:class:`QuantitySpec`) so docs and forms can be generated from the models.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Annotated, Any

from pydantic import AfterValidator, BeforeValidator, ConfigDict, Field, WithJsonSchema
from pydantic_core import PydanticCustomError

from labkit.core.errors import UnitError
from labkit.core.locations import NAME_PATTERN
from labkit.core.units import KINDS, format_quantity, parse_quantity


@dataclass(frozen=True)
class QuantitySpec:
    """Metadata of a quantity field: its kind and the values that make physical sense."""

    kind: str
    minimum: float | None = None
    maximum: float | None = None
    exclusive_minimum: bool = False
    plausible: tuple[float, float] | None = None


def _parser(spec: QuantitySpec) -> Any:
    def parse(value: Any) -> float:
        try:
            return parse_quantity(value, spec.kind, plausible=spec.plausible)
        except UnitError as exc:
            msg = "unit"
            raise PydanticCustomError(msg, "{reason}", {"reason": str(exc)}) from None

    return parse


def _range_check(spec: QuantitySpec) -> Any:
    def check(value: float) -> float:
        low, high = spec.minimum, spec.maximum
        bad_low = low is not None and (value <= low if spec.exclusive_minimum else value < low)
        if bad_low or (high is not None and value > high):
            parts = []
            if low is not None:
                parts.append(("> " if spec.exclusive_minimum else ">= ") + format_quantity(low, spec.kind))
            if high is not None:
                parts.append("<= " + format_quantity(high, spec.kind))
            msg = "physical_range"
            raise PydanticCustomError(
                msg, "physically absurd value {found}: expected {expected}",
                {"found": format_quantity(value, spec.kind), "expected": " and ".join(parts)})
        return value

    return check


def quantity_field(kind: str, *, minimum: float | None = None, maximum: float | None = None,
                   positive: bool = False, plausible: tuple[float, float] | None = None) -> Any:
    """An annotated float type for a value written with a unit of ``kind``."""
    if kind not in KINDS:
        msg = f"unknown quantity kind {kind!r}"
        raise ValueError(msg)
    spec = QuantitySpec(kind, 0.0 if positive and minimum is None else minimum, maximum,
                        exclusive_minimum=positive, plausible=plausible)
    example = KINDS[kind].example
    return Annotated[
        float,
        BeforeValidator(_parser(spec)),
        AfterValidator(_range_check(spec)),
        WithJsonSchema({"type": "string", "examples": [example], "x-kind": kind}),
        spec,
    ]


# Common field types -----------------------------------------------------------------------
Voltage = quantity_field("voltage", positive=True)
Current = quantity_field("current", positive=True)
Resistance = quantity_field("resistance", minimum=0.0)
Inductance = quantity_field("inductance", minimum=0.0)
Capacitance = quantity_field("capacitance", minimum=0.0)
Frequency = quantity_field("frequency", positive=True, maximum=1e5)
ApparentPower = quantity_field("apparent_power", positive=True)
ActivePower = quantity_field("active_power")
ReactivePower = quantity_field("reactive_power")
Time = quantity_field("time", minimum=0.0)
Length = quantity_field("length", positive=True)
Angle = quantity_field("angle", minimum=-360.0, maximum=360.0)
Tolerance = quantity_field("ratio", minimum=0.0, maximum=1.0)  # a tolerance of more than 100 % is absurd
Percent = quantity_field("ratio", minimum=0.0, maximum=10.0)


def located_error(message: str, *at: str | int) -> PydanticCustomError:
    """A model validator's error that points at a key inside the model (``at``), not at the model as a whole.

    :mod:`labkit.files.validation` appends ``at`` to the error's field path, so a
    file error names the line of that key.
    """
    return PydanticCustomError("value_error", message.replace("{", "(").replace("}", ")"), {"at": list(at)})


Name = Annotated[str, Field(pattern=f"^{NAME_PATTERN}$", max_length=64)]
"""A bus, element, sensor or step id: a letter, then letters, digits, ``_``, ``-`` or ``.``."""

STRICT = ConfigDict(extra="forbid", frozen=True, str_strip_whitespace=True)
