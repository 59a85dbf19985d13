"""Tidy pandas tables of predictions: one row per step, location and quantity.

Array-level results (:mod:`labkit.core.predict`) are turned into DataFrames here
and nowhere else, so the solve can be timed and reused without pandas.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from labkit.core.predict import Prediction, StepPrediction
from labkit.core.quantities import quantity

PREDICTION_COLUMNS = {
    "step": "string",
    "step_index": "int64",
    "kind": "string",
    "location": "string",
    "quantity": "string",
    "unit": "string",
    "predicted": "float64",
    "band_low": "float64",
    "band_high": "float64",
    "status": "string",
    "note": "string",
}


def _strings(values: list[str]) -> pd.api.extensions.ExtensionArray:
    return pd.array(np.array(values, dtype=object), dtype="string")


def prediction_frame(pred: Prediction, step: str = "", step_index: int = -1, kind: str = "") -> pd.DataFrame:
    """The tidy table of one prediction (columns and dtypes: :data:`PREDICTION_COLUMNS`)."""
    labels = pred.labels
    n = len(labels)
    columns = {
        "step": _strings([step] * n),
        "step_index": np.full(n, step_index, dtype=np.int64),
        "kind": _strings([kind] * n),
        "location": _strings([lab.location for lab in labels]),
        "quantity": _strings([lab.quantity for lab in labels]),
        "unit": _strings([quantity(lab.quantity).unit for lab in labels]),
        "predicted": np.asarray(pred.nominal, dtype=np.float64),
        "band_low": np.asarray(pred.band_low, dtype=np.float64),
        "band_high": np.asarray(pred.band_high, dtype=np.float64),
        "status": _strings([lab.status for lab in labels]),
        "note": _strings([lab.note for lab in labels]),
    }
    return pd.DataFrame(columns, copy=False)


def template_frame(steps: Sequence[StepPrediction]) -> pd.DataFrame:
    """The tidy table of every step of a template prediction."""
    frames = [prediction_frame(s.prediction, s.step_id, s.index, s.kind) for s in steps if s.prediction is not None]
    if not frames:
        return pd.DataFrame({k: pd.Series(dtype=v) for k, v in PREDICTION_COLUMNS.items()})
    return pd.concat(frames, ignore_index=True)
