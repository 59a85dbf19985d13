"""Quantity kinds in front of pint: parse ``"2.5 mH"`` into SI for a field of a known kind.

pint knows dimensions, but a lab needs more than dimensions: W, var and VA share
one dimension yet must never be mixed; Hz and rad/s share one dimension yet mean
different numbers; ``MA`` is a valid unit (megaampere) that nobody on a bench
means. :func:`parse_quantity` checks all three and returns a float in SI units
(angles in degrees, ratios as fractions: see :mod:`labkit.core.conventions`).

>>> parse_quantity("2.5 mH", "inductance")
0.0025
>>> parse_quantity("40 uF", "capacitance")
4e-05
>>> parse_quantity("850 mA", "current")
0.85
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from functools import cache
from typing import TYPE_CHECKING

from labkit.core.errors import UnitError

if TYPE_CHECKING:
    import pint


@dataclass(frozen=True)
class Kind:
    """A quantity kind: what a field holds, its SI unit and the unit families it accepts."""

    name: str
    si_unit: str
    # Root unit names (prefixes stripped) a value may be written in; None: any of the dimension.
    roots: frozenset[str] | None
    # Plausible magnitudes on a bench, SI; outside them a prefix case slip is suspected.
    plausible: tuple[float, float]
    example: str
    forbidden_roots: frozenset[str] = frozenset()


_LENGTHS = frozenset({"meter", "mile", "foot", "yard", "inch"})

KINDS: dict[str, Kind] = {
    k.name: k
    for k in [
        Kind("voltage", "V", frozenset({"volt"}), (1e-6, 1e6), "120 V"),
        Kind("current", "A", frozenset({"ampere"}), (1e-9, 1e4), "850 mA"),
        Kind("resistance", "ohm", frozenset({"ohm", "volt", "ampere"}), (1e-6, 1e9), "2.2 ohm"),
        Kind("inductance", "H", frozenset({"henry"}), (1e-9, 1e3), "2.5 mH"),
        Kind("capacitance", "F", frozenset({"farad"}), (1e-15, 1.0), "40 uF"),
        Kind("frequency", "Hz", frozenset({"hertz"}), (1e-3, 1e6), "60 Hz", frozenset({"radian"})),
        Kind("angular_frequency", "rad/s", frozenset({"radian", "second"}), (1e-3, 1e7), "377 rad/s"),
        Kind("active_power", "W", frozenset({"watt"}), (1e-6, 1e10), "250 W"),
        Kind("reactive_power", "var", frozenset({"volt_ampere_reactive"}), (1e-6, 1e10), "150 var"),
        Kind("apparent_power", "VA", frozenset({"volt_ampere"}), (1e-6, 1e10), "1 kVA"),
        Kind("length", "m", _LENGTHS, (1e-3, 1e7), "16 km"),
        Kind("time", "s", frozenset({"second", "minute", "hour"}), (1e-9, 1e6), "40 ms"),
        Kind("angle", "deg", frozenset({"degree", "radian"}), (0.0, 1e6), "30 deg"),
        Kind("ratio", "", frozenset({"percent", "ppm"}), (0.0, 1e3), "5 %"),
        Kind("inertia", "kg*m**2", None, (1e-9, 1e6), "0.05 kg*m^2"),
        Kind("torque", "N*m", None, (1e-6, 1e6), "8 N*m"),
        Kind("resistance_per_length", "ohm/m", frozenset({"ohm"}) | _LENGTHS, (1e-12, 1e6), "0.036 ohm/km"),
        Kind("inductance_per_length", "H/m", frozenset({"henry"}) | _LENGTHS, (1e-15, 1e3), "0.8 mH/km"),
        Kind("capacitance_per_length", "F/m", frozenset({"farad"}) | _LENGTHS, (1e-21, 1.0), "0.0112 uF/km"),
        Kind("conductance_per_length", "S/m", frozenset({"siemens"}) | _LENGTHS, (0.0, 1e3), "0 uS/km"),
        Kind("voltage_per_voltage", "", frozenset({"volt"}), (1e-9, 1e9), "100 V/V"),
        Kind("voltage_per_current", "V/A", frozenset({"volt", "ampere", "ohm"}), (1e-9, 1e9), "0.1 V/A"),
        Kind("speed_gain", "N*m*s", None, (0.0, 1e9), "0.5 N*m*s"),
        Kind("rate_gain", "N*m", None, (0.0, 1e9), "2 N*m"),
        Kind("frequency_droop", "Hz/W", None, (0.0, 1e3), "0.003 Hz/W"),
    ]
}

_DECIMAL_COMMA = re.compile(r"^\s*[-+]?\d+,\d+")
_NUMBER_THEN_UNIT = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(.*?)\s*$")
_SWAPS = {"M": "m", "m": "M", "K": "k", "U": "u", "N": "n", "P": "p", "G": "g"}


@cache
def registry() -> pint.UnitRegistry:
    """The one pint registry labkit uses, with var and VA kept as their own units."""
    import pint

    reg = pint.UnitRegistry(autoconvert_offset_to_baseunit=False)
    reg.define("volt_ampere_reactive = volt_ampere = var = VAr")
    reg.define("ppm = 1e-6 = _ = parts_per_million")
    return reg


def _normalize(unit_text: str) -> str:
    text = unit_text.strip()
    for old, new in (("µ", "u"), ("μ", "u"), ("Ω", "ohm"), ("°", "deg"), ("²", "**2"), ("^", "**")):
        text = text.replace(old, new)
    text = re.sub(r"\bohms\b", "ohm", text)
    return text


def _roots(units: pint.Unit) -> dict[str, int]:
    reg = registry()
    roots: dict[str, int] = {}
    for name, power in units._units.items():
        _, base, _ = reg.parse_unit_name(name)[0]
        roots[base] = roots.get(base, 0) + power
    return roots


def _prefix_swaps(unit_text: str) -> list[str]:
    """Unit strings that differ from ``unit_text`` by the case of its first prefix letter."""
    if not unit_text or unit_text[0] not in _SWAPS:
        return []
    return [_SWAPS[unit_text[0]] + unit_text[1:]]


def _convert(value: float, unit_text: str, kind: Kind) -> float:
    """Convert ``value unit_text`` to the kind's SI unit; raise UnitError on the wrong kind."""
    import pint

    reg = registry()
    try:
        units = reg.Unit(_normalize(unit_text))
    except (pint.errors.UndefinedUnitError, pint.errors.DefinitionSyntaxError, AttributeError, TypeError,
            ValueError, AssertionError) as exc:
        msg = f'unknown unit "{unit_text}"'
        raise UnitError(msg) from exc
    if not _accepts(kind, units):
        others = [k.name.replace("_", " ") for k in KINDS.values() if k is not kind and _accepts(k, units)]
        what = f" (it is a unit of {others[0]})" if others else ""
        msg = (f'"{unit_text}" is not a unit of {kind.name.replace("_", " ")}{what}; '
               f'expected a unit like "{kind.example}"')
        raise UnitError(msg)
    target = reg.Unit(kind.si_unit) if kind.si_unit else reg.dimensionless
    return float(reg.Quantity(value, units).to(target).magnitude)


def _accepts(kind: Kind, units: pint.Unit) -> bool:
    """True when ``units`` has the kind's dimension and only unit families the kind allows."""
    reg = registry()
    roots = _roots(units)
    target = reg.Unit(kind.si_unit) if kind.si_unit else reg.dimensionless
    return (units.dimensionality == target.dimensionality
            and (kind.roots is None or set(roots) <= kind.roots)
            and not set(roots) & kind.forbidden_roots)


def parse_quantity(
    text: str | float | int,
    kind: str,
    *,
    plausible: tuple[float, float] | None = None,
    decimal_comma: bool = False,
) -> float:
    """Parse a value written with its unit into the SI value of ``kind``.

    Parameters
    ----------
    text
        ``"2.5 mH"``, ``"5 %"``, ``"16 km"``. A bare number is accepted only for
        dimensionless kinds (``ratio``: a fraction, ``voltage_per_voltage``).
    kind
        A key of :data:`KINDS`.
    plausible
        (low, high) magnitude in SI the field can hold; outside it a prefix whose
        case, flipped, lands inside is reported as a likely slip ("did you mean mA?").
        Defaults to the kind's bench-scale range.
    decimal_comma
        Accept ``"2,5 mH"`` (a configured locale); refused otherwise.

    Returns
    -------
    float
        The value in the kind's SI unit (degrees for angles, a fraction for ratios).
    """
    spec = KINDS[kind]
    if isinstance(text, bool):
        msg = f"expected a {kind.replace('_', ' ')} like \"{spec.example}\", found a true/false value"
        raise UnitError(msg)
    if isinstance(text, int | float):
        if (spec.si_unit in ("", "deg") and spec.name != "angle") or spec.name == "ratio":
            return float(text)
        msg = f'a number without a unit: write the {kind.replace("_", " ")} with its unit, like "{spec.example}"'
        raise UnitError(msg)
    raw = str(text)
    if _DECIMAL_COMMA.match(raw):
        if not decimal_comma:
            fixed = raw.replace(",", ".", 1).strip()
            msg = f'"{raw}" has a decimal comma; write "{fixed}" (or configure a decimal-comma locale)'
            raise UnitError(msg)
        raw = raw.replace(",", ".", 1)
    match = _NUMBER_THEN_UNIT.match(raw)
    if not match:
        msg = f'"{raw}" is not a number followed by a unit, like "{spec.example}"'
        raise UnitError(msg)
    number, unit_text = float(match.group(1)), match.group(2)
    if not math.isfinite(number):
        msg = f'"{raw}" is not a finite number'
        raise UnitError(msg)
    if not unit_text:
        if spec.si_unit == "" or spec.name == "ratio":
            return number
        msg = f'"{raw}" has no unit: write the {kind.replace("_", " ")} with its unit, like "{spec.example}"'
        raise UnitError(msg)
    low, high = plausible if plausible is not None else spec.plausible
    try:
        value = _convert(number, unit_text, spec)
    except UnitError as first:
        for alt in _prefix_swaps(unit_text):
            try:
                _convert(number, alt, spec)
            except UnitError:
                continue
            msg = f'{first} (did you mean "{alt}"?)'
            raise UnitError(msg) from first
        raise
    magnitude = abs(value)
    if magnitude != 0.0 and not low <= magnitude <= high:
        for alt in _prefix_swaps(unit_text):
            try:
                alt_value = abs(_convert(number, alt, spec))
            except UnitError:
                continue
            if low <= alt_value <= high:
                msg = (f'"{raw}" is {magnitude:.4g} {spec.si_unit or "(ratio)"}, implausible here '
                       f'(did you mean "{number:g} {alt}"? unit prefixes are case-sensitive)')
                raise UnitError(msg)
        # No case slip explains it: a value this far outside a bench's scale is a typo, not a reading.
        msg = (f'"{raw}" is {magnitude:.4g} {spec.si_unit or "(ratio)"}, outside the plausible range '
               f"{low:g}..{high:g} {spec.si_unit or '(ratio)'} for a {kind.replace('_', ' ')}")
        raise UnitError(msg)
    return value


def unit_factor(unit_text: str, kind: str) -> float:
    """The SI value of one ``unit_text`` of ``kind`` (``"mA"`` -> 0.001), for units given on their own.

    A unit whose size is outside the kind's bench-scale range (``"MA"`` for a
    current) is refused with the case-slip hint, like :func:`parse_quantity`.

    Raises
    ------
    UnitError
        Unknown unit, a unit of another kind, or a likely case slip.
    """
    try:
        return parse_quantity(f"1 {unit_text}", kind)
    except UnitError as exc:
        text = str(exc).replace(f'"1 {unit_text}"', f'unit "{unit_text}"').replace('"1 ', '"')
        raise UnitError(text) from None


def format_quantity(value: float, kind: str, digits: int = 4) -> str:
    """Write an SI value with its kind's unit and an engineering prefix: ``0.0025`` H -> ``"2.5 mH"``."""
    spec = KINDS[kind]
    if spec.name == "ratio":
        return f"{value * 100:.{digits}g} %"
    unit = spec.si_unit
    if not unit or "*" in unit or "/" in unit or unit == "deg":
        return f"{value:.{digits}g} {unit}".strip()
    if value == 0 or not math.isfinite(value):
        return f"{value:g} {unit}"
    exponent = int(math.floor(math.log10(abs(value)) / 3) * 3)
    exponent = max(-15, min(9, exponent))
    prefix = {-15: "f", -12: "p", -9: "n", -6: "u", -3: "m", 0: "", 3: "k", 6: "M", 9: "G"}[exponent]
    return f"{value / 10**exponent:.{digits}g} {prefix}{unit}"
