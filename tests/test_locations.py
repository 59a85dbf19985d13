"""The location grammar (labkit/core/locations.py): round trips and refusals.

The grammar is labkit's own; the reference is its written form in docs/conventions.md. Names follow the
common-practice identifier rule (a letter, then letters, digits, ``_``, ``-`` or ``.``).
"""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st

from labkit.core.errors import LocationError
from labkit.core.locations import Location, bus, element_end, is_valid_name, parse_location, sensor

NAMES = st.from_regex(r"\A[A-Za-z][A-Za-z0-9_.\-]{0,12}\Z")


@pytest.mark.parametrize(("text", "expected"), [
    ("B1", Location("node", "B1")),
    ("L12@B1", Location("end", "L12", "B1")),
    ("sensor:I1", Location("sensor", "I1")),
    ("  G1T  ", Location("node", "G1T")),
    ("SYNC1@B1", Location("end", "SYNC1", "B1")),
    ("line-2.a@bus_3", Location("end", "line-2.a", "bus_3")),
])
def test_examples(text: str, expected: Location) -> None:
    assert parse_location(text) == expected


@given(name=NAMES, at=NAMES)
def test_round_trips(name: str, at: str) -> None:
    for text, kind in ((bus(name), "node"), (element_end(name, at), "end"), (sensor(name), "sensor")):
        loc = parse_location(text)
        assert loc.kind == kind
        assert str(loc) == text
        assert parse_location(str(loc)) == loc
    assert is_valid_name(name)


@pytest.mark.parametrize("text", ["", "   ", "1B", "B 1", "L12@", "@B1", "L12@B1@B2", "sensor:", "sensor:1x",
                                  "B1:sensor", "sensors:I1", "L12@@B1", "é1", "B1,B2", "_B1"])
def test_refused(text: str) -> None:
    with pytest.raises(LocationError, match="location"):
        parse_location(text)


@pytest.mark.parametrize("value", [None, 3, ["B1"]])
def test_non_strings_are_refused(value: object) -> None:
    with pytest.raises(LocationError, match="expected a location"):
        parse_location(value)  # type: ignore[arg-type]


@given(text=st.text(max_size=12))
def test_anything_either_parses_or_is_refused_with_the_grammar(text: str) -> None:
    message = ""
    try:
        loc = parse_location(text)
    except LocationError as exc:
        message = str(exc)
    if message:
        assert "BUS, ELEMENT, ELEMENT@BUS or sensor:ID" in message
    else:
        assert parse_location(str(loc)) == loc
