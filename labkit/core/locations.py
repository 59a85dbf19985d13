"""The location grammar: where a quantity is, written the same way everywhere.

::

    location  := NAME                a bus (voltages) or an element as a whole (losses, loading)
               | NAME "@" NAME       an element's end at a bus: current positive from the bus
                                     into the element (passive sign convention)
               | "sensor:" NAME      a sensor of the bench, in its own reference direction
    NAME      := letter (letter | digit | "_" | "-" | ".")*

Bus, element and sensor names are unique across one bench (the loader checks),
so a bare NAME resolves to exactly one thing. Bus voltage magnitude is the
quantity ``v_rms`` at location ``B1``.

>>> parse_location("L12@B1")
Location(kind='end', name='L12', bus='B1')
>>> str(parse_location("sensor:I1"))
'sensor:I1'
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Literal

from labkit.core.errors import LocationError

NAME_PATTERN = r"[A-Za-z][A-Za-z0-9_.\-]*"
_NAME = re.compile(rf"^{NAME_PATTERN}$")
_END = re.compile(rf"^({NAME_PATTERN})@({NAME_PATTERN})$")
_SENSOR = re.compile(rf"^sensor:({NAME_PATTERN})$")

LocationKind = Literal["node", "end", "sensor"]


@dataclass(frozen=True)
class Location:
    """A parsed location. ``kind`` is ``node`` for a bare name (a bus or a whole element)."""

    kind: LocationKind
    name: str
    bus: str | None = None

    def __str__(self) -> str:
        if self.kind == "end":
            return f"{self.name}@{self.bus}"
        if self.kind == "sensor":
            return f"sensor:{self.name}"
        return self.name


def is_valid_name(name: str) -> bool:
    """True when ``name`` can be a bus, element or sensor name."""
    return bool(_NAME.match(name))


def parse_location(text: str) -> Location:
    """Parse a location string; raise :class:`LocationError` saying what the grammar expects."""
    s = text.strip() if isinstance(text, str) else text
    if not isinstance(s, str) or not s:
        msg = f"expected a location (BUS, ELEMENT, ELEMENT@BUS or sensor:ID), found {text!r}"
        raise LocationError(msg)
    if m := _SENSOR.match(s):
        return Location("sensor", m.group(1))
    if m := _END.match(s):
        return Location("end", m.group(1), m.group(2))
    if _NAME.match(s):
        return Location("node", s)
    msg = f'"{text}" is not a location: expected BUS, ELEMENT, ELEMENT@BUS or sensor:ID'
    raise LocationError(msg)


def bus(name: str) -> str:
    """The location string of a bus."""
    return name


def element_end(element: str, at_bus: str) -> str:
    """The location string of an element's end at a bus."""
    return f"{element}@{at_bus}"


def sensor(sensor_id: str) -> str:
    """The location string of a sensor."""
    return f"sensor:{sensor_id}"
