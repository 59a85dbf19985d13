"""The verdict rule: is a measured reading consistent with its prediction?

Rule (also in ``docs/verdicts.md``)
    With the prediction's tolerance band ``[band_low, band_high]`` (5th to 95th
    percentile over component tolerances) and the reading's tolerance ``tol``:

    * ``accept``    when ``band_low - tol <= measured <= band_high + tol``;
    * ``marginal``  when the reading is beyond that but within ``k * tol`` of the band
      (``band_low - k tol <= measured <= band_high + k tol``), ``k`` = :data:`MARGINAL_FACTOR` = 3;
    * ``outside``   beyond ``k * tol`` from the band;
    * ``unchecked`` when no prediction exists (or the measured value is not a number).

    Boundaries are inclusive; a relative allowance of 1e-9 only absorbs the binary
    representation of decimal entries (121.19 - 120.0 is 1.1899999999999977), it does not
    widen the rule.

Tolerance
    The template's ``tolerance`` of the reading: ``"2 %"`` (of the predicted value), an
    absolute value with the quantity's unit (``"0.05 Hz"``; a bare number for quantities in
    ``1`` or ``%``), or ``"instrument"``: the instrument's accuracy,
    ``class x full scale (the range) + % of reading x |reading| + digits x resolution``
    (:class:`labkit.core.bench.Accuracy`), of the bench sensor that took the reading or of a
    typed meter. Powers combine the voltage and current instruments' relative tolerances
    (worst case, ``|P| (tol_V / V + tol_I / I)``). Quantities that no instrument accuracy
    describes (angles, power factor, frequency, THD) get tolerance 0: the band alone decides.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from labkit.core.bench import Accuracy
from labkit.core.conventions import wrap_deg
from labkit.core.errors import UnitError
from labkit.core.quantities import quantity
from labkit.core.units import parse_quantity

MARGINAL_FACTOR = 3.0
"""k: a reading within k x its tolerance beyond the band is marginal, beyond that outside."""
_BOUNDARY_RTOL = 1e-9

VOLTAGE_MAGNITUDES = frozenset({"v_rms", "v1_rms", "vh_rms", "v_dc", "v_drop", "v_across"})
CURRENT_MAGNITUDES = frozenset({"i_rms", "i1_rms", "ih_rms", "i_dc"})
POWERS = frozenset({"p", "p1", "q1", "s", "s1"})


@dataclass(frozen=True)
class Meter:
    """A hand-held or panel meter a reading was typed from.

    Attributes
    ----------
    accuracy
        ``+-(reading % x |reading| + full-scale % x range + digits x resolution)``; resolution in the
        quantity's registry unit.
    range
        Full scale of the range used, in the quantity's registry unit (NaN when not known).
    name
        What the meter is (free text, kept with the reading).
    """

    accuracy: Accuracy
    range: float = math.nan
    name: str = ""


def instrument_tolerance(accuracy: Accuracy, reading: float, full_scale: float) -> float:
    """``class x full scale + % of reading x |reading| + digits x resolution`` (in the reading's unit).

    Parameters
    ----------
    accuracy
        Fractions (``reading = 0.005`` for 0.5 %) and the resolution of the last digit.
    reading
        The measured value (its magnitude is used).
    full_scale
        The range in use; NaN or 0 when unknown (the class term then drops out).
    """
    fs = 0.0 if not math.isfinite(full_scale) else abs(full_scale)
    return float(accuracy.full_scale * fs + accuracy.reading * abs(reading) + accuracy.digits * accuracy.resolution)


def template_tolerance(text: str, quantity_name: str, predicted: float) -> float | None:
    """The tolerance a template writes, in the quantity's registry unit; None for ``"instrument"``.

    ``"3 %"`` is relative to ``|predicted|``; ``"0.05 Hz"`` is absolute; a bare number is absolute in the
    unit of a ``1`` or ``%`` quantity (``"0.03"`` on a power factor, ``"0.5"`` percentage points of THD).

    Raises
    ------
    UnitError
        A tolerance that is none of these.
    """
    t = text.strip()
    if t == "instrument":
        return None
    q = quantity(quantity_name)
    if t.endswith("%"):
        return parse_quantity(t, "ratio") * abs(predicted)
    if q.unit in ("1", "%"):
        try:
            return float(t)
        except ValueError as exc:
            msg = f'tolerance "{text}" of {quantity_name}: expected "instrument", "2 %" or a bare number in {q.unit}'
            raise UnitError(msg) from exc
    return parse_quantity(t, q.kind) * q.scale


def verdict(measured: float, band_low: float, band_high: float, tolerance: float, *,
            predicted: float = 0.0, angle: bool = False, k: float = MARGINAL_FACTOR) -> str:
    """The verdict of one reading: ``accept``, ``marginal``, ``outside`` or ``unchecked``.

    Parameters
    ----------
    measured
        The reading in the prediction's unit and form (RMS).
    band_low, band_high
        The prediction's tolerance band; NaN when there is no prediction (``unchecked``).
    tolerance
        The tolerance applied (>= 0), same unit.
    predicted
        The nominal prediction; for angles the reading is taken at the turn nearest to it.
    angle
        True for angle quantities (degrees): differences wrap at +-180 deg.
    k
        The marginal factor.
    """
    values = (measured, band_low, band_high, tolerance)
    if any(v is None or not math.isfinite(v) for v in values):
        return "unchecked"
    if tolerance < 0:
        msg = f"a tolerance must not be negative, found {tolerance!r}"
        raise ValueError(msg)
    m = measured
    if angle:  # the same direction written on another turn: compare at the turn nearest the prediction
        m = predicted + float(wrap_deg(measured - predicted))
    distance = max(band_low - m, m - band_high, 0.0)
    allowance = _BOUNDARY_RTOL * max(abs(m), abs(band_low), abs(band_high), 1e-300)
    if distance <= tolerance + allowance:
        return "accept"
    if distance <= k * tolerance + allowance:
        return "marginal"
    return "outside"


def verdicts(measured: np.ndarray, band_low: np.ndarray, band_high: np.ndarray, tolerance: np.ndarray,
             k: float = MARGINAL_FACTOR) -> np.ndarray:
    """The same rule over arrays (non-angle quantities), for review tables."""
    m, lo, hi, tol = (np.asarray(a, dtype=float) for a in (measured, band_low, band_high, tolerance))
    distance = np.maximum(np.maximum(lo - m, m - hi), 0.0)
    allowance = _BOUNDARY_RTOL * np.maximum.reduce([np.abs(m), np.abs(lo), np.abs(hi), np.full(m.shape, 1e-300)])
    out = np.where(distance <= tol + allowance, "accept",
                   np.where(distance <= k * tol + allowance, "marginal", "outside")).astype(object)
    bad = ~(np.isfinite(m) & np.isfinite(lo) & np.isfinite(hi) & np.isfinite(tol))
    out[bad] = "unchecked"
    return out
