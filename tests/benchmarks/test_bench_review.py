"""Benchmark: the review report over 1,000 sessions (about 1,000,000 readings), synthesized per schema.py.

Prints wall time and peak memory (tracemalloc, plus the process's peak RSS); no timed assertion.
Target: <= 20 s and <= 2 GiB at full scale. With CI set it runs at 1/10 scale and says so.
Data are invented (seeded generator), labelled DEMO DATA.
"""

from __future__ import annotations

import os
import resource
import time
import tracemalloc

import numpy as np
import pandas as pd
import pytest

from labkit.logbook.schema import READING_COLUMNS, SESSION_COLUMNS, column_names
from labkit.report.review import ReviewFilter, review, review_report

QUANTITIES = [("v_rms", "V", 120.0), ("i_rms", "A", 1.2), ("p", "W", 140.0), ("q1", "var", 30.0),
              ("pf", "1", 0.95), ("frequency", "Hz", 60.0), ("phase", "deg", -20.0), ("slip", "Hz", 0.1)]
LOCATIONS = ["B1", "B2", "B3", "L12@B1", "L12@B2", "RB@B2", "LB@B2", "SYNC1@B1"]


def synthesize(n_sessions: int, readings_per_session: int = 1000, seed: int = 2026) -> tuple[pd.DataFrame,
                                                                                              pd.DataFrame]:
    """Invented sessions and readings (DEMO DATA) with the schema's columns and dtypes."""
    rng = np.random.default_rng(seed)
    n_steps, per_step = 25, 8  # 200 keys per session, each read ~4-5 times, ~10 % corrected
    sid = np.array([f"{k:032x}" for k in range(n_sessions)], dtype=object)
    sections = np.array([f"S{k:02d}" for k in range(8)], dtype=object)
    carts = np.array([f"cart-{k:02d}" for k in range(max(8, n_sessions // 50))], dtype=object)  # ~50 sessions each
    created = pd.Timestamp("2026-09-01", tz="UTC") + pd.to_timedelta(rng.integers(0, 100, n_sessions), unit="D")
    kinds = np.where(rng.random(n_sessions) < 0.05, "practice", "lab")
    sess_section = sections[rng.integers(0, sections.size, n_sessions)]
    sess_cart = carts[rng.integers(0, carts.size, n_sessions)]
    version = np.where(rng.random(n_sessions) < 0.02, "0.9", "1.0")
    sessions = pd.DataFrame({
        "session_id": sid, "kind": kinds, "state": "closed", "section": sess_section,
        "group": [f"G{k % 12}" for k in range(n_sessions)], "cart": sess_cart, "people": '["p-1", "p-2"]',
        "template_id": "lab-bench-review", "template_version": version,
        "template_sha256": np.where(version == "1.0", "a" * 64, "b" * 64), "template_text": "", "bench_id": "demo",
        "bench_version": "1.0", "bench_sha256": "c" * 64, "bench_text": "", "cart_sha256": "", "cart_text": "",
        "labkit_version": "0.1.0", "mc_seed": 1459, "mc_samples": 2000, "created_at": created,
        "created_by": "ta-01"})
    n = n_sessions * readings_per_session
    s_of = np.repeat(np.arange(n_sessions), readings_per_session)
    key_in_session = rng.integers(0, n_steps * per_step, n)
    step = key_in_session // per_step
    q_idx = key_in_session % len(QUANTITIES)
    loc_idx = (key_in_session // 3) % len(LOCATIONS)
    nominal = np.array([q[2] for q in QUANTITIES])[q_idx]
    # one drifting cart: its voltage readings creep up 0.05 %/day
    days = ((created - created.min()) / pd.Timedelta(days=1)).to_numpy(float)[s_of]
    drift = np.where((sess_cart[s_of] == "cart-07") & (q_idx == 0), 0.0005 * days, 0.0)
    err = rng.normal(0.0, 0.01, n) + drift + np.where(rng.random(n) < 0.03, 0.4, 0.0)
    measured = nominal * (1 + err)
    band = np.abs(nominal) * 0.02
    corrected = rng.random(n) < 0.1
    revision = np.zeros(n, dtype=np.int64)
    # corrections: a copy of the row with revision 1 and an accepted value
    rows = {
        "revision": np.concatenate([revision, np.ones(corrected.sum(), dtype=np.int64)]),
        "supersedes": np.concatenate([revision - 1, np.zeros(corrected.sum(), dtype=np.int64)]),
    }
    pick = np.concatenate([np.arange(n), np.flatnonzero(corrected)])
    fixed = np.concatenate([np.zeros(n, bool), np.ones(corrected.sum(), bool)])
    m = pick.size

    def text(labels: object, codes: np.ndarray | int = 0) -> pd.Series:
        """A text column as the SQLite archive returns it (Arrow strings), built from few distinct labels."""
        labels = np.atleast_1d(np.asarray(labels, dtype=object))
        codes = np.broadcast_to(np.asarray(codes, dtype=np.int64), (m,))
        return pd.Series(pd.Categorical.from_codes(codes, labels)
                         ).astype("string[pyarrow]")

    unit_codes, unit_labels = pd.factorize(np.array([q[1] for q in QUANTITIES], dtype=object))
    big = np.abs(err[pick]) > 0.3
    v_code = np.where(fixed, 0, np.select([np.abs(err[pick]) <= 0.02, np.abs(err[pick]) <= 0.04], [0, 1], 2))
    meas = np.where(fixed, nominal[pick], measured[pick])
    frame = pd.DataFrame({
        "reading_id": pd.Series(np.char.mod("%032x", np.arange(n))[np.concatenate([np.arange(n),
                                                                                    np.flatnonzero(corrected)])]
                                ).astype("string[pyarrow]"),
        "revision": rows["revision"], "supersedes": rows["supersedes"],
        "session_id": text(sid, s_of[pick]), "section": text(sections, pd.Index(sections).get_indexer(
            sess_section)[s_of[pick]]), "group": text("G1"),
        "cart": text(carts, pd.Index(carts).get_indexer(sess_cart)[s_of[pick]]),
        "step_id": text([f"step-{k:02d}" for k in range(n_steps)], step[pick]),
        "step_index": step[pick], "step_kind": text("free_reading"), "location": text(LOCATIONS, loc_idx[pick]),
        "quantity": text([q[0] for q in QUANTITIES], q_idx[pick]),
        "unit": text(list(unit_labels), unit_codes[q_idx[pick]]), "predicted": nominal[pick],
        "band_low": nominal[pick] - band[pick], "band_high": nominal[pick] + band[pick], "tolerance": band[pick],
        "measured": meas, "entered": text(""), "form": text("rms"), "meter_range": np.full(m, np.nan),
        "obtained": text("typed"), "sensor": text(""), "verdict": text(["accept", "marginal", "outside"], v_code),
        "diagnosis": text(["", "reading looks like the peak value"], big.astype(int)),
        "diagnosis_code": text(["", "peak_for_rms"], big.astype(int)), "anchor": text("nominal"),
        "capture_id": text(""), "recorded_at": pd.Timestamp("2026-09-01", tz="UTC"),
        "seq": np.arange(m, dtype=np.int64), "recorded_by": text("p-1"), "reason": text(""), "note": text(""),
    })
    frame = frame[column_names(READING_COLUMNS)]
    assert list(sessions.columns) == column_names(SESSION_COLUMNS)
    for col in sessions.columns:
        if sessions[col].dtype == object:
            sessions[col] = sessions[col].astype("string[pyarrow]")
    return sessions, frame


@pytest.mark.benchmark
def test_bench_review() -> None:
    ci = bool(os.environ.get("CI"))
    n_sessions = 100 if ci else 1000
    t0 = time.perf_counter()
    sessions, readings = synthesize(n_sessions)
    t_synth = time.perf_counter() - t0
    rss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux: KiB -> MiB
    data_mib = (readings.memory_usage(deep=True).sum() + sessions.memory_usage(deep=True).sum()) / 2**20
    # timed without tracemalloc (it slows pandas several-fold); memory is the process's peak RSS
    t1 = time.perf_counter()
    result = review(sessions, readings, ReviewFilter())
    t_review = time.perf_counter() - t1
    rep = review_report(result)
    t_total = time.perf_counter() - t1
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    # a second, traced run of the review gives the review's own peak allocation
    tracemalloc.start()
    review(sessions, readings, ReviewFilter())
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    scale = "1/10 scale (CI set)" if ci else "full scale"
    print(f"\nreview benchmark, {scale}: {n_sessions} sessions, {len(readings):,} reading rows "
          f"(synthesized in {t_synth:.1f} s)")
    print(f"  review tables {t_review:.2f} s, tables + HTML {t_total:.2f} s (target <= 20 s at full scale)")
    print(f"  process peak RSS {rss:.0f} MiB (target <= 2 GiB; peak before the review {rss_before:.0f} MiB, "
          f"the log tables {data_mib:.0f} MiB); review's traced peak allocation {peak / 2**20:.0f} MiB")
    print(f"  HTML {len(rep.html) / 1e6:.2f} MB; drifting cart rows flagged: "
          f"{int(result.tables['carts']['drifting'].sum())}")
    # the invented drifting cart must be found (a check of the review, not of its speed)
    flagged = result.tables["carts"]
    assert ((flagged["cart"] == "cart-07") & (flagged["quantity"] == "v_rms") & flagged["drifting"]).any()
