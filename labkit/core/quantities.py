"""The quantity registry: every quantity name labkit emits, with its kind, unit and IEEE 1459 symbol.

Predictions, capture analyses, the log, reports and every CLI use these names
verbatim; ``tests/test_registry.py`` checks that everything the code emits is
registered here. Values in tidy tables are in :attr:`Quantity.unit`, which is
the SI unit of the kind times :attr:`Quantity.scale` (``%`` for THD, say).

Harmonic quantities are a family: ``v_h3``, ``i_h5``, ``v_h3_angle`` (orders 2
to 63), resolved by :func:`quantity`.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from labkit.core.errors import UnknownNameError, did_you_mean


@dataclass(frozen=True)
class Quantity:
    """One registered quantity."""

    name: str
    kind: str  # a key of labkit.core.units.KINDS
    unit: str  # the unit values are written in, in tables and files
    description: str
    symbol: str = ""  # IEEE 1459-2010 symbol where one exists
    clause: str = ""  # IEEE 1459-2010 clause of the definition, where one exists
    scale: float = 1.0  # value in `unit` = SI value * scale


_Q = Quantity
_REGISTERED: list[Quantity] = [
    _Q("v_rms", "voltage", "V", "true RMS voltage; in a phasor solution the bus voltage magnitude", "V", "3.1.2"),
    _Q("v1_rms", "voltage", "V", "RMS of the fundamental voltage", "V1", "3.1.2"),
    _Q("vh_rms", "voltage", "V", "RMS of all non-fundamental voltage content (harmonics and dc)", "VH", "3.1.2"),
    _Q("v_angle", "angle", "deg", "angle of the fundamental voltage phasor against the reference, (-180, 180]"),
    _Q("v_dc", "voltage", "V", "mean (dc) value of the voltage"),
    _Q("i_rms", "current", "A", "true RMS current, positive in the location's reference direction", "I", "3.1.2"),
    _Q("i1_rms", "current", "A", "RMS of the fundamental current", "I1", "3.1.2"),
    _Q("ih_rms", "current", "A", "RMS of all non-fundamental current content (harmonics and dc)", "IH", "3.1.2"),
    _Q("i_angle", "angle", "deg", "angle of the fundamental current phasor against the reference, (-180, 180]"),
    _Q("i_dc", "current", "A", "mean (dc) value of the current"),
    _Q("phase", "angle", "deg",
       "fundamental current angle relative to the fundamental voltage, negative when the current lags"),
    _Q("p", "active_power", "W", "active power absorbed (passive sign convention)", "P", "3.1.2.3"),
    _Q("p1", "active_power", "W", "fundamental active power", "P1", "3.1.2.3"),
    _Q("ph", "active_power", "W", "non-fundamental (harmonic) active power P - P1", "PH", "3.1.2.5"),
    _Q("q1", "reactive_power", "var", "fundamental reactive power, positive inductive", "Q1", "3.1.2.4"),
    _Q("s", "apparent_power", "VA", "apparent power V*I", "S", "3.1.2.7"),
    _Q("s1", "apparent_power", "VA", "fundamental apparent power V1*I1", "S1", "3.1.2.8"),
    _Q("sn", "apparent_power", "VA", "non-fundamental apparent power sqrt(S^2 - S1^2)", "SN", "3.1.2.9"),
    _Q("di", "reactive_power", "var", "current distortion power V1*IH", "DI", "3.1.2.10"),
    _Q("dv", "reactive_power", "var", "voltage distortion power VH*I1", "DV", "3.1.2.11"),
    _Q("sh", "apparent_power", "VA", "harmonic apparent power VH*IH", "SH", "3.1.2.12"),
    _Q("dh", "reactive_power", "var", "harmonic distortion power sqrt(SH^2 - PH^2)", "DH", "3.1.2.13"),
    _Q("n", "reactive_power", "var", "non-active power sqrt(S^2 - P^2)", "N", "3.1.2.14"),
    _Q("pf", "ratio", "1", "power factor P/S", "PF", "3.1.2.17"),
    _Q("pf1", "ratio", "1", "fundamental (displacement) power factor P1/S1", "PF1", "3.1.2.16"),
    _Q("thd_v", "ratio", "%", "total harmonic distortion of voltage VH/V1", "THDV", "3.1.2.1", 100.0),
    _Q("thd_i", "ratio", "%", "total harmonic distortion of current IH/I1", "THDI", "3.1.2.1", 100.0),
    _Q("thd_v_table", "ratio", "%", "voltage THD from the harmonic table, sqrt(sum V_h^2, h = 2..15) / V1",
       scale=100.0),
    _Q("thd_i_table", "ratio", "%", "current THD from the harmonic table, sqrt(sum I_h^2, h = 2..15) / I1",
       scale=100.0),
    _Q("crest_v", "ratio", "1", "crest factor of the voltage, peak over RMS"),
    _Q("crest_i", "ratio", "1", "crest factor of the current, peak over RMS"),
    _Q("frequency", "frequency", "Hz", "fundamental frequency", "f"),
    _Q("p_loss", "active_power", "W", "active power lost in an element (line, internal impedance)"),
    _Q("q_loss", "reactive_power", "var", "reactive power absorbed by an element's series and shunt parts"),
    _Q("v_drop", "voltage", "V", "magnitude of the sending-end voltage minus the receiving-end voltage"),
    _Q("regulation", "ratio", "%", "voltage regulation (|Vs|/|A| - |Vr|) / |Vr|", scale=100.0),
    _Q("loading", "ratio", "%", "component current as a percentage of its rating, true RMS", scale=100.0),
    _Q("slip", "frequency", "Hz", "slip frequency, incoming minus running"),
    _Q("beat_period", "time", "s", "beat period 1/|slip|"),
    _Q("dv_sync", "ratio", "%", "voltage difference at a sync switch, (incoming - running) / running",
       scale=100.0),
    _Q("dphi_sync", "angle", "deg", "phase difference at a sync switch, incoming minus running"),
    _Q("v_across", "voltage", "V", "RMS voltage across an open switch"),
    _Q("advance_angle", "angle", "deg", "angle the incoming side gains while a switch closes"),
    _Q("f_nadir", "frequency", "Hz", "lowest (or highest) frequency after a disturbance"),
    _Q("settling_time", "time", "s", "time until the frequency stays inside its settling band"),
    _Q("overshoot", "frequency", "Hz", "largest excursion beyond the final frequency"),
    _Q("surge_peak", "current", "A", "first-cycle peak current estimate at closing"),
]

REGISTRY: dict[str, Quantity] = {q.name: q for q in _REGISTERED}

_HARMONIC = re.compile(r"^(v|i)_h(\d{1,2})(_angle)?$")


def quantity(name: str) -> Quantity:
    """Look a quantity up by name; harmonic families (``v_h3``, ``i_h5_angle``) included.

    Raises
    ------
    UnknownNameError
        With a did-you-mean hint when the name is close to a registered one.
    """
    if name in REGISTRY:
        return REGISTRY[name]
    match = _HARMONIC.match(name)
    if match and 2 <= int(match.group(2)) <= 63:
        signal, order, angle = match.group(1), int(match.group(2)), match.group(3)
        noun = "voltage" if signal == "v" else "current"
        if angle:
            return Quantity(name, "angle", "deg", f"angle of the {noun} harmonic of order {order}")
        return Quantity(name, "voltage" if signal == "v" else "current", "V" if signal == "v" else "A",
                        f"RMS {noun} of the harmonic of order {order}", f"{signal.upper()}{order}", "3.1.2")
    msg = f'unknown quantity "{name}"{did_you_mean(name, REGISTRY)}'
    raise UnknownNameError(msg)


def is_registered(name: str) -> bool:
    """True when :func:`quantity` knows ``name``."""
    try:
        quantity(name)
    except UnknownNameError:
        return False
    return True
