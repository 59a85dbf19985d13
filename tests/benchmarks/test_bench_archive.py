"""Benchmark: durable commit latency, merging 100 hand-ins, loading 1,000,000 readings (snapshots and cold).

Prints figures only (no timed assertion). Targets: commit p99 <= 10 ms with synchronous=FULL; 1,000,000
readings into a DataFrame <= 2 s through snapshots and <= 15 s cold from SQLite. Peers measured in the same
run: a plain ``sqlite3`` executemany insert of the same rows with synchronous=OFF (the floor of the insert
cost), and ``pd.read_parquet`` of one file holding all rows (the floor of the load).

With ``CI`` set, the load uses 100,000 readings (10 sessions of 10,000, the snapshot size of the full
run) and the load figures are also extrapolated linearly to 1,000,000 (the print says so). The big archive
is filled by a direct executemany of storage rows (setup, not measured): its row hashes are placeholders,
so it is not ``check()``-clean, which loading does not need.
"""

from __future__ import annotations

import os
import sqlite3
import statistics
import time
import uuid
from pathlib import Path

import pandas as pd
import pytest

from labkit.logbook import layout
from labkit.logbook.rows import now_ns, storage_row
from labkit.logbook.schema import READING_COLUMNS
from labkit.logbook.snapshots import load_readings
from labkit.logbook.sqlite import SQLiteArchive
from tests.reliability.factory import reading_row, session_row

CI = bool(os.environ.get("CI"))
N_LOAD = 100_000 if CI else 1_000_000
ROWS_PER_SESSION = 10_000  # the same snapshot size in both modes, so the extrapolation scales file counts
N_SESSIONS = N_LOAD // ROWS_PER_SESSION
N_COMMITS = 200 if CI else 500


def _pct(values: list[float], q: float) -> float:
    return statistics.quantiles(values, n=100, method="inclusive")[int(q) - 1] if len(values) > 1 else values[0]


def _storage_rows(session_ids: list[str], n: int) -> list[tuple]:
    """n reading rows in storage form, spread over the sessions (seq per session), placeholder row hashes."""
    template = storage_row("readings", reading_row(session_ids[0]))
    names = [c.name for c in READING_COLUMNS]
    base = now_ns()
    rows = []
    per = n // len(session_ids)
    for s, session_id in enumerate(session_ids):
        for k in range(per):
            values = dict(template, reading_id=uuid.uuid4().hex, session_id=session_id, step_index=k % 9,
                          step_id=f"step-{k % 9}", measured=228.0 + (k % 100) * 0.01, seq=k,
                          recorded_at=base + (s * per + k) * 1000)
            rows.append((*(values[c] for c in names), values["reading_id"]))
    return rows


@pytest.mark.benchmark
def test_bench_archive(tmp_path: Path) -> None:
    lines = [f"archive benchmark ({'CI: reduced counts' if CI else 'full counts'})"]

    # 1. durable commit latency through the archive, synchronous=FULL
    archive = SQLiteArchive(tmp_path / "latency.sqlite")
    session = session_row()
    archive.create_session(session)
    rows = [reading_row(session["session_id"], k) for k in range(N_COMMITS)]
    times = []
    for row in rows:
        start = time.perf_counter()
        archive.append_reading(row)
        times.append((time.perf_counter() - start) * 1e3)
    archive.close()
    lines.append(f"  append_reading, synchronous=FULL, {N_COMMITS} commits: p50 {_pct(times, 50):.2f} ms, "
                 f"p99 {_pct(times, 99):.2f} ms (target p99 <= 10 ms)")
    # peer: plain sqlite3 executemany of the same rows, synchronous=OFF
    floor = sqlite3.connect(tmp_path / "floor.sqlite", isolation_level=None)
    floor.execute("PRAGMA synchronous = OFF")
    floor.execute(layout.table_sql("readings"))
    names = [c.name for c in READING_COLUMNS]
    plain = [(*(storage_row("readings", r)[n] if n not in ("seq", "recorded_at") else k for n in names), "x")
             for k, r in enumerate(rows)]
    insert = f"INSERT INTO readings ({layout.column_list('readings')}, row_sha256) VALUES ({', '.join('?' * 34)})"
    start = time.perf_counter()
    floor.execute("BEGIN")
    floor.executemany(insert, plain)
    floor.execute("COMMIT")
    floor_ms = (time.perf_counter() - start) * 1e3 / len(plain)
    floor.close()
    lines.append(f"  peer: sqlite3 executemany, synchronous=OFF, one transaction: {floor_ms * 1e3:.1f} us per row")

    # 2. merging 100 hand-in files (one session of 20 readings each)
    files = []
    for k in range(100):
        laptop = SQLiteArchive(tmp_path / f"laptop{k}.sqlite")
        s = session_row()
        laptop.create_session(s)
        laptop.append_readings([reading_row(s["session_id"], j) for j in range(20)])
        files.append(laptop.hand_in(tmp_path / f"handin{k}.sqlite"))
        laptop.close()
    central = SQLiteArchive(tmp_path / "central.sqlite")
    start = time.perf_counter()
    report = central.merge(files)
    merge_s = time.perf_counter() - start
    central.close()
    assert report.merged_rows == 2000
    assert not report.refused
    lines.append(f"  merge of 100 hand-ins (2,000 readings, one transaction): {merge_s:.2f} s")

    # 3. loading N_LOAD readings: snapshots vs cold
    big = SQLiteArchive(tmp_path / "big.sqlite")
    sessions = [session_row() for _ in range(N_SESSIONS)]
    for s in sessions:
        big.create_session(s)
    data = _storage_rows([s["session_id"] for s in sessions], N_LOAD)
    big._write(lambda c: c.executemany(insert, data), "benchmark setup")
    data.clear()
    for s in sessions:
        big.append_event({"session_id": s["session_id"], "by": "ta01", "role": "ta", "event": "state:closed"})
    start, cpu = time.perf_counter(), time.process_time()
    cold = load_readings(big, use_snapshots=False)
    cold_s, cold_cpu = time.perf_counter() - start, time.process_time() - cpu
    start = time.perf_counter()
    big.reading_table(workers=2)  # also starts the worker process
    first_s = time.perf_counter() - start
    start = time.perf_counter()
    shared = big.reading_table(workers=2)
    shared_s = time.perf_counter() - start
    assert shared.num_rows == N_LOAD
    del shared
    start = time.perf_counter()
    load_readings(big)  # builds the snapshots
    build_s = time.perf_counter() - start
    start = time.perf_counter()
    warm = load_readings(big)
    warm_s = time.perf_counter() - start
    assert len(warm) == len(cold) == N_LOAD
    one = tmp_path / "all.parquet"
    warm.to_parquet(one, index=False)
    start = time.perf_counter()
    peer = pd.read_parquet(one)
    peer_s = time.perf_counter() - start
    assert len(peer) == N_LOAD
    big.close()
    scale = 1_000_000 / N_LOAD
    label = f"{N_LOAD:,} readings"
    lines.append(f"  load {label} through {N_SESSIONS} snapshots: {warm_s:.2f} s (target <= 2 s for 1,000,000)")
    lines.append(f"  load {label} cold from SQLite: {cold_s:.2f} s wall, {cold_cpu:.2f} s CPU "
                 f"(target <= 15 s for 1,000,000; {os.cpu_count()} CPUs, load average {os.getloadavg()[0]:.1f})")
    lines.append(f"  the same read as Arrow shared with 1 worker process: {shared_s:.2f} s "
                 f"(the first such read, starting the worker: {first_s:.2f} s)")
    lines.append(f"  building the {N_SESSIONS} snapshots: {build_s:.2f} s")
    lines.append(f"  peer: pd.read_parquet of one file with all rows: {peer_s:.2f} s")
    if scale != 1:
        lines.append(f"  extrapolated linearly to 1,000,000 readings: snapshots {warm_s * scale:.1f} s, "
                     f"cold {cold_s * scale:.1f} s (with a worker {shared_s * scale:.1f} s), "
                     f"peer {peer_s * scale:.1f} s")
    print("\n".join(lines))
