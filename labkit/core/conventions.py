"""Scope and sign conventions, written once; the code imports them from here.

The same text, key by key, is in ``docs/conventions.md``.

Scope
    Single-phase benches, and the per-phase (line-to-neutral) equivalent of a
    balanced three-phase bench. Every voltage quantity names its basis
    (:class:`VoltageBasis`): a bench file states it once and every prediction,
    reading and report carries it.
Phasors
    RMS phasors: ``V = |V| * exp(j*angle)`` with ``|V|`` the RMS value; the
    instantaneous value is ``sqrt(2)*|V|*cos(w*t + angle)``.
Element powers
    Passive sign convention: the current at an element's terminal is positive
    flowing from the bus *into* the element, so ``S = V * conj(I)`` is the
    power the element absorbs; a source delivering power shows negative
    absorbed power at its terminal, and its *delivered* power is reported as
    ``p``/``q`` of the source with the generator sign stated (``p_out``).
Current sensors
    Every current sensor has a reference direction (``from`` -> ``to``) in the
    bench file; a reading is positive when current flows that way. A sensor
    reading opposite to the prediction can then be told apart from real
    reverse power flow.
Angles
    Degrees, wrapped to (-180, 180] (:func:`wrap_deg`). ``phase`` at a
    location is the current's fundamental angle relative to the voltage's:
    negative when the current lags.
Reactive power
    Positive for inductive loads (current lagging voltage), IEEE 1459-2010.
    A power factor is reported with its sense: ``lagging`` when Q1 > 0 at a
    load, ``leading`` when Q1 < 0 (:func:`pf_sense`).
Synchronization
    Differences are *incoming minus running*: slip ``f_in - f_run``, voltage
    difference ``(V_in - V_run) / V_run``, phase ``angle_in - angle_run``
    (:func:`sync_difference`).
Internal units
    SI inside (V, A, ohm, H, F, Hz, W, var, VA, s, m), except angles (degrees)
    and ratios (fractions; shown as %). Units appear in column names
    (``r_ohm``, ``c_f``, ``v_rms_v``) and in the ``unit`` column of tidy tables.
"""

from __future__ import annotations

from enum import StrEnum
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray


class VoltageBasis(StrEnum):
    """What a voltage quantity is measured between."""

    SINGLE_PHASE = "single_phase"
    """A single-phase bench: line to neutral of that one phase."""
    LINE_TO_NEUTRAL = "line_to_neutral"
    """Per-phase equivalent of a balanced three-phase bench, phase to neutral."""
    LINE_TO_LINE = "line_to_line"
    """Between two phases of a balanced three-phase bench (sqrt(3) times line to neutral)."""


SQRT3 = float(np.sqrt(3.0))


def to_line_to_neutral(v: ArrayLike, basis: VoltageBasis) -> NDArray[np.float64]:
    """Convert a voltage magnitude on ``basis`` to the per-phase (line-to-neutral) value."""
    arr = np.asarray(v, dtype=float)
    return arr / SQRT3 if basis is VoltageBasis.LINE_TO_LINE else arr


def wrap_deg(angle_deg: ArrayLike) -> NDArray[np.float64]:
    """Wrap angles in degrees to (-180, 180].

    >>> wrap_deg([180.0, -180.0, 190.0, 540.0]).tolist()
    [180.0, 180.0, -170.0, 180.0]
    """
    a = np.asarray(angle_deg, dtype=float)
    wrapped = np.mod(a + 180.0, 360.0) - 180.0
    return np.where(wrapped == -180.0, 180.0, wrapped)


def phasor_angle_deg(z: ArrayLike) -> NDArray[np.float64]:
    """Angle of complex phasors in degrees, wrapped to (-180, 180]."""
    return wrap_deg(np.degrees(np.angle(np.asarray(z, dtype=complex))))


def pf_sense(q_var: float, p_w: float = 1.0) -> Literal["lagging", "leading", "unity"]:
    """The power-factor sense of an absorbed power: lagging for inductive (Q > 0), IEEE 1459."""
    if abs(q_var) <= 1e-12 * max(abs(p_w), 1e-300):
        return "unity"
    return "lagging" if q_var > 0 else "leading"


def sync_difference(incoming: ArrayLike, running: ArrayLike) -> NDArray[np.float64]:
    """Incoming minus running, the sign convention of every synchronization difference."""
    return np.asarray(incoming, dtype=float) - np.asarray(running, dtype=float)


def sync_phase_difference_deg(incoming_deg: ArrayLike, running_deg: ArrayLike) -> NDArray[np.float64]:
    """Incoming angle minus running angle, wrapped to (-180, 180]."""
    return wrap_deg(sync_difference(incoming_deg, running_deg))


# Names used by tidy tables; the values are the strings written to files and logs.
SIGN_CONVENTION = "passive"  # element powers are absorbed powers
REACTIVE_SIGN = "inductive_positive"  # IEEE 1459-2010
ANGLE_UNIT = "deg"
ANGLE_RANGE = "(-180, 180]"
