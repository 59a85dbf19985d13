"""The unit layer: values with units into SI, kinds kept apart, typos refused with a hint.

Outside references: the SI prefixes and derived units (BIPM, *The International System of Units*, 9th ed. 2019,
Tables 4 and 7: m = 1e-3, u/µ = 1e-6, k = 1e3, M = 1e6; prefix symbols are case-sensitive), and pint's own
conversions from a fresh registry (not labkit's) for the property test. W, var and VA are kept apart as IEEE
1459-2010 §3.1 does (same dimension, different quantities); Hz and rad/s likewise (BIPM SI Brochure 2.3.4: the
hertz is used only for periodic phenomena, the radian per second for angular velocity).
"""

from __future__ import annotations

import math
import re

import pint
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from labkit.core.errors import UnitError
from labkit.core.units import KINDS, format_quantity, parse_quantity, unit_factor

PINT = pint.UnitRegistry()  # an independent registry: labkit's own one adds var and ppm

# text, kind, SI value (by the SI prefix definitions, BIPM SI Brochure Table 7)
PARSE_TABLE = [
    ("2.5 mH", "inductance", 2.5e-3),
    ("40 uF", "capacitance", 40e-6),
    ("40 µF", "capacitance", 40e-6),  # micro sign U+00B5
    ("40 μF", "capacitance", 40e-6),  # Greek small mu U+03BC
    ("16 km", "length", 16e3),
    ("850 mA", "current", 0.85),
    ("2.2 ohm", "resistance", 2.2),
    ("2.2 Ω", "resistance", 2.2),
    ("3 kΩ", "resistance", 3e3),
    ("480 ohms", "resistance", 480.0),
    ("0.12 kV", "voltage", 120.0),
    ("199.186 kV", "voltage", 199186.0),
    ("1.5 kVA", "apparent_power", 1500.0),
    ("90 MVA", "apparent_power", 90e6),
    ("150 var", "reactive_power", 150.0),
    ("-4 var", "reactive_power", -4.0),
    ("2 kvar", "reactive_power", 2000.0),
    ("250 W", "active_power", 250.0),
    ("60 Hz", "frequency", 60.0),
    ("377 rad/s", "angular_frequency", 377.0),
    ("40 ms", "time", 0.04),
    ("30 deg", "angle", 30.0),
    ("30°", "angle", 30.0),
    ("5 %", "ratio", 0.05),
    ("0.05", "ratio", 0.05),
    ("0.036 ohm/km", "resistance_per_length", 0.036e-3),
    ("0.8 mH/km", "inductance_per_length", 0.8e-6),
    ("0.0112 uF/km", "capacitance_per_length", 0.0112e-9),
    ("0.08 kg*m^2", "inertia", 0.08),
    ("0.08 kg*m²", "inertia", 0.08),
    ("8 N*m", "torque", 8.0),
    ("100 V/V", "voltage_per_voltage", 100.0),
    ("0.5 V/A", "voltage_per_current", 0.5),
    ("  2.5e-3 H  ", "inductance", 2.5e-3),
]


@pytest.mark.parametrize(("text", "kind", "si"), PARSE_TABLE)
def test_parse_table(text: str, kind: str, si: float) -> None:
    assert parse_quantity(text, kind) == pytest.approx(si, rel=1e-12)


def test_angle_in_radians_is_degrees_inside() -> None:
    # 1 rad = 180/pi degrees (BIPM SI Brochure Table 8); labkit keeps angles in degrees
    assert parse_quantity("1 rad", "angle") == pytest.approx(180.0 / math.pi)


@pytest.mark.parametrize(("text", "kind", "other"), [
    ("60 var", "active_power", "reactive power"),
    ("60 VA", "active_power", "apparent power"),
    ("5 W", "reactive_power", "active power"),
    ("5 VA", "reactive_power", "apparent power"),
    ("1 kW", "apparent_power", "active power"),
    ("2 kvar", "apparent_power", "reactive power"),
    ("377 rad/s", "frequency", "angular frequency"),
    ("60 Hz", "angular_frequency", "frequency"),
    ("4 ohm", "inductance", "resistance"),
    ("4 mH", "resistance", "inductance"),
])
def test_kinds_of_one_dimension_are_kept_apart(text: str, kind: str, other: str) -> None:
    with pytest.raises(UnitError, match=f"is not a unit of {kind.replace('_', ' ')} \\(it is a unit of {other}\\)"):
        parse_quantity(text, kind)


@pytest.mark.parametrize(("text", "kind", "hint"), [
    ("850 MA", "current", '"850 mA"'),  # megaampere on a bench cart: a case slip
    ("0.12 KV", "voltage", '"kV"'),  # no unit "KV" exists
    ("6 MH", "inductance", '"6 mH"'),
    ("40 UF", "capacitance", '"uF"'),
])
def test_case_slips_get_a_hint(text: str, kind: str, hint: str) -> None:
    with pytest.raises(UnitError, match=f"did you mean {hint}"):
        parse_quantity(text, kind)


def test_large_prefixes_are_fine_where_plausible() -> None:
    assert parse_quantity("90 MVA", "apparent_power") == 90e6
    assert parse_quantity("1 MW", "active_power") == 1e6


def test_decimal_comma_is_refused_unless_configured() -> None:
    with pytest.raises(UnitError, match=re.escape('decimal comma; write "2.5 mH"')):
        parse_quantity("2,5 mH", "inductance")
    assert parse_quantity("2,5 mH", "inductance", decimal_comma=True) == pytest.approx(2.5e-3)


@pytest.mark.parametrize(("value", "kind", "match"), [
    (0.6, "resistance", "a number without a unit"),
    (60, "frequency", "a number without a unit"),
    ("0.6", "resistance", "has no unit"),
    (True, "voltage", "true/false"),
    ("ohm 0.6", "resistance", "not a number followed by a unit"),
    ("", "voltage", "not a number followed by a unit"),
    ("0.6 ohmz", "resistance", 'unknown unit "ohmz"'),
    ("1e30 V", "voltage", "outside the plausible range"),
    ("1e-30 F", "capacitance", "outside the plausible range"),
    ("3 kg", "voltage", "not a unit of voltage"),
    ("5 V", "ratio", "not a unit of ratio"),
])
def test_bad_values_are_refused(value: object, kind: str, match: str) -> None:
    with pytest.raises(UnitError, match=match):
        parse_quantity(value, kind)  # type: ignore[arg-type]


def test_bare_numbers_are_fractions_for_ratios() -> None:
    assert parse_quantity(0.05, "ratio") == 0.05
    assert parse_quantity(100, "voltage_per_voltage") == 100.0


def test_zero_is_allowed_outside_the_plausible_range() -> None:
    assert parse_quantity("0 uS/km", "conductance_per_length") == 0.0
    assert parse_quantity("0 ohm", "resistance") == 0.0


@pytest.mark.parametrize(("unit", "kind", "factor"), [("mA", "current", 1e-3), ("kV", "voltage", 1e3),
                                                      ("MVA", "apparent_power", 1e6), ("var", "reactive_power", 1.0)])
def test_unit_factor(unit: str, kind: str, factor: float) -> None:
    assert unit_factor(unit, kind) == pytest.approx(factor)


def test_unit_factor_names_the_unit_in_its_hint() -> None:
    with pytest.raises(UnitError, match=r'unit "MA" .*did you mean "mA"'):
        unit_factor("MA", "current")
    with pytest.raises(UnitError, match='"A" is not a unit of active power'):
        unit_factor("A", "active_power")


# -- property: labkit agrees with pint on every prefix and unit of the plain kinds -----------------------------------
PLAIN = {"voltage": "V", "current": "A", "resistance": "ohm", "inductance": "H", "capacitance": "F",
         "frequency": "Hz", "active_power": "W", "apparent_power": "VA", "length": "m", "time": "s"}
PREFIXES = ["p", "n", "u", "m", "", "k", "M"]


@settings(max_examples=200, deadline=None)
@given(kind=st.sampled_from(sorted(PLAIN)), prefix=st.sampled_from(PREFIXES),
       mantissa=st.floats(1.0, 999.0, allow_nan=False))
def test_parse_agrees_with_pint(kind: str, prefix: str, mantissa: float) -> None:
    unit = prefix + PLAIN[kind]
    text = f"{mantissa!r} {unit}"
    reference = PINT.Quantity(mantissa, unit).to(PLAIN[kind]).magnitude  # pint, outside reference
    low, high = KINDS[kind].plausible
    if low <= reference <= high:
        assert parse_quantity(text, kind) == pytest.approx(reference, rel=1e-12)
    else:
        with pytest.raises(UnitError):
            parse_quantity(text, kind)


@settings(max_examples=100, deadline=None)
@given(kind=st.sampled_from(sorted(PLAIN)), exponent=st.integers(-5, 5), mantissa=st.floats(1.0, 9.99))
def test_format_then_parse_round_trips(kind: str, exponent: int, mantissa: float) -> None:
    value = mantissa * 10.0 ** exponent
    low, high = KINDS[kind].plausible
    assume(low <= value <= high)
    assert parse_quantity(format_quantity(value, kind, digits=12), kind) == pytest.approx(value, rel=1e-9)


def test_format_quantity_examples() -> None:
    # engineering prefixes, common practice
    assert format_quantity(0.0025, "inductance") == "2.5 mH"
    assert format_quantity(0.05, "ratio") == "5 %"
    assert format_quantity(199186.0, "voltage") == "199.2 kV"


def test_every_kind_parses_its_own_example() -> None:
    for kind in KINDS.values():
        assert math.isfinite(parse_quantity(kind.example, kind.name)), kind.name
