"""Builders of invented logbook data (DEMO DATA) for the report tests, shaped by labkit.logbook.schema.

No tests here: the helpers make session rows and reading rows from the demo bench and templates, so the
report tests judge real predictions against invented measurements.
"""

from __future__ import annotations

import functools
import hashlib
import json
import uuid
from typing import Any

import numpy as np
import pandas as pd

from labkit.core.predict import predict_template
from labkit.demo_files import demo_path
from labkit.files.loader import load_bench, load_template
from labkit.logbook.schema import READING_COLUMNS, SESSION_COLUMNS, column_names
from labkit.report.common import reading_frame

T0 = pd.Timestamp("2026-10-05 13:00", tz="UTC")


def sha(text: str) -> str:
    return hashlib.sha256(text.encode()).hexdigest()


@functools.lru_cache(maxsize=8)
def plan(template_name: str = "lab2-synchronize.toml", with_cart: bool = True) -> tuple[Any, Any, str, str, str,
                                                                                           list[Any]]:
    """(bench, template, bench_text, template_text, cart_text, step predictions) of a demo template."""
    bench_path, cart_path = demo_path("demo-bench.toml"), demo_path("demo-cart-03.toml")
    loaded = load_bench(bench_path, cart_path if with_cart else None)
    template = load_template(demo_path(template_name), loaded.bench).template
    steps = predict_template(loaded.bench, template, n_samples=200, seed=7)
    cart_text = cart_path.read_text() if with_cart else ""
    return (loaded.bench, template, bench_path.read_text(), demo_path(template_name).read_text(), cart_text, steps)


def session_row(session_id: str, *, section: str = "S01", group: str = "G1", cart: str = "cart-03",
                kind: str = "lab", people: list[str] | None = None, template_name: str = "lab2-synchronize.toml",
                created_at: pd.Timestamp = T0, template_text: str | None = None,
                template_version: str | None = None) -> dict[str, Any]:
    bench, template, bench_text, ttext, cart_text, _ = plan(template_name)
    ttext = template_text if template_text is not None else ttext
    return {
        "session_id": session_id, "kind": kind, "state": "submitted", "section": section, "group": group,
        "cart": cart, "people": json.dumps(people or ["p-101", "p-102"]), "template_id": template.template.id,
        "template_version": template_version or template.template.version, "template_sha256": sha(ttext),
        "template_text": ttext, "bench_id": bench.bench.id, "bench_version": bench.bench.version,
        "bench_sha256": sha(bench_text), "bench_text": bench_text, "cart_sha256": sha(cart_text),
        "cart_text": cart_text, "labkit_version": "0.1.0", "mc_seed": 7, "mc_samples": 200,
        "created_at": created_at, "created_by": "ta-01",
    }


def sessions_frame(rows: list[dict[str, Any]]) -> pd.DataFrame:
    frame = pd.DataFrame(rows, columns=column_names(SESSION_COLUMNS))
    frame["created_at"] = pd.to_datetime(frame["created_at"], utc=True)
    return frame


def verdict_of(measured: float, low: float, high: float, tol: float) -> str:
    """Invented test rule (not labkit's): inside the band accept; within one tolerance beyond it marginal."""
    if not np.isfinite(measured):
        return "unchecked"
    if low <= measured <= high:
        return "accept"
    if low - tol <= measured <= high + tol:
        return "marginal"
    return "outside"


def readings_for(session: dict[str, Any], *, error: float = 0.0, seed: int = 0, note: str = "",
                 recorded_by: str = "p-101", corrections: bool = False, template_name: str = "lab2-synchronize.toml"
                 ) -> pd.DataFrame:
    """One reading per planned reading, measured = predicted x (1 + error + noise); optional corrections."""
    _, template, *_, steps = plan(template_name)
    rng = np.random.default_rng(seed)
    rows: list[dict[str, Any]] = []
    seq = 0
    for step, sp in zip(template.steps, steps, strict=True):
        for spec in step.readings:
            value, low, high = sp.prediction.reading(spec.location, spec.quantity, spec.sensor)
            measured = value * (1.0 + error + rng.normal(0.0, 0.002))
            tol = abs(value) * 0.02
            seq += 1
            base = {
                "reading_id": uuid.uuid4().hex, "revision": 0, "supersedes": -1,
                "session_id": session["session_id"], "section": session["section"], "group": session["group"],
                "cart": session["cart"], "step_id": step.id, "step_index": template.index_of(step.id),
                "step_kind": step.kind, "location": spec.location, "quantity": spec.quantity, "unit": spec.unit,
                "predicted": value, "band_low": low, "band_high": high, "tolerance": tol, "measured": measured,
                "entered": f"{measured:.4g} {spec.unit}", "form": "rms", "meter_range": np.nan,
                "obtained": "typed", "sensor": spec.sensor or "", "verdict": verdict_of(measured, low, high, tol),
                "diagnosis": "", "diagnosis_code": "", "anchor": "nominal", "capture_id": "",
                "recorded_at": session["created_at"] + pd.Timedelta(minutes=seq), "seq": seq,
                "recorded_by": recorded_by, "reason": "", "note": note,
            }
            if base["verdict"] == "outside":
                base["diagnosis"] = "reading looks like the peak value, not RMS"
                base["diagnosis_code"] = "peak_for_rms"
            rows.append(base)
            if corrections:
                seq += 1
                fixed = dict(base, revision=1, supersedes=0, measured=value, entered=f"{value:.4g} {spec.unit}",
                             verdict="accept", reason="typed the wrong digit", seq=seq, diagnosis="",
                             diagnosis_code="", recorded_at=base["recorded_at"] + pd.Timedelta(seconds=30))
                rows.append(fixed)
    frame = reading_frame(rows)
    assert list(frame.columns) == column_names(READING_COLUMNS)
    return frame
