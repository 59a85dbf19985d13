"""Readings imported from a file go through the same checks as typed ones.

:func:`validate_imported` is the validator ``labkit import`` passes to
:func:`labkit.logbook.exchange.import_readings`: the quantity must be registered with its
registry unit, a measured value must be finite and of a plausible size for its kind, and an
RMS reading's ``entered`` text must parse (with the same unit rules, decimal commas and
prefix case slips included) to the ``measured`` value it claims.
"""

from __future__ import annotations

import math
from typing import Any

from labkit.core.errors import UnitError
from labkit.core.quantities import quantity
from labkit.core.units import KINDS
from labkit.logbook.exchange import CellProblem, check_quantity
from labkit.session.readings import _parse_in_unit


def validate_imported(row: dict[str, Any]) -> dict[str, Any]:
    """Check one imported reading row; raise ``CellProblem(column, reason)`` on the first problem."""
    row = check_quantity(row)
    q = quantity(str(row["quantity"]))
    measured = row.get("measured")
    if measured is not None and not (isinstance(measured, float) and math.isnan(measured)):
        value = float(measured)
        if not math.isfinite(value):
            msg = "measured"
            raise CellProblem(msg, f"not a finite number: {measured!r}")
        low, high = KINDS[q.kind].plausible
        si = abs(value) / q.scale
        if si != 0.0 and not low <= si <= high:
            msg = "measured"
            raise CellProblem(msg, f"{value:g} {q.unit} is not a plausible {q.kind.replace('_', ' ')}")
    entered = str(row.get("entered") or "").strip()
    # the importer marks rows "imported"; an entered text that is a value (not a capture summary) is re-read
    if row.get("form") == "rms" and entered and not entered.startswith("capture") and measured is not None:
        # a bare number is in the row's unit (exports write the value as entered, the unit in its own column)
        text = entered if not _is_bare_number(entered) or q.unit in ("1", "%") else f"{entered} {q.unit}"
        try:
            parsed = _parse_in_unit(text, q.name, q.unit, decimal_comma=False)
        except UnitError as exc:
            msg = "entered"
            raise CellProblem(msg, str(exc)) from None
        if not math.isclose(parsed, float(measured), rel_tol=1e-9, abs_tol=1e-12):
            msg = "measured"
            raise CellProblem(msg, f"the entered text {entered!r} reads {parsed:g} {q.unit}, "
                                          f"not the {float(measured):g} recorded")
    return row


def _is_bare_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True
