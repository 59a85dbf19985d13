"""Benchmark: the shared archive on loopback PostgreSQL (figures printed, nothing timed is asserted).

- 16 concurrent writers (one student login and session each, row security and triggers on), one
  committed transaction per reading: readings/s in total and p50/p99 latency (targets, from the brief:
  >= 500 readings/s, p99 <= 50 ms);
- the peer in the same run: the same 16 threads doing plain INSERTs of the same columns into an
  unpoliced table with psycopg ``executemany`` in 10-row transactions (a pgbench-style floor);
- ``archive push`` of 100 hand-in files (one session, 5 readings each), then the same 100 again
  (all skipped by content hash).
"""

from __future__ import annotations

import statistics
import threading
import time
import uuid

import pytest

from tests.pg_support import pg_server  # noqa: F401
from tests.reliability.factory import reading_row, session_row

psycopg = pytest.importorskip("psycopg")

WRITERS = 16
SECONDS = 1.5
MAX_PER_WRITER = 400


def _p(values: list[float], q: float) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(q * len(ordered)))]


@pytest.mark.benchmark
def test_bench_postgres_writers_and_push(pg_server, tmp_path):  # noqa: F811
    from labkit.logbook.postgres import PostgresArchive, add_member
    from labkit.logbook.sqlite import SQLiteArchive

    name = f"bench_{uuid.uuid4().hex[:6]}"
    owner = pg_server.fresh_database(name)
    add_member(owner, "bench_ta", "ta", section="S01", password="bench-ta-pw")
    pg_server.passwords["bench_ta"] = "bench-ta-pw"
    ta = PostgresArchive(pg_server.url("bench_ta", database=name))
    sessions = []
    for k in range(WRITERS):
        login = f"bench_s{k:02d}"
        add_member(owner, login, "student", section="S01", group=f"G{k:02d}", password=f"pw-{login}")
        pg_server.passwords[login] = f"pw-{login}"
        sid = uuid.uuid4().hex
        ta.create_session(session_row(sid, group=f"G{k:02d}", state="open"))
        sessions.append((login, sid, f"G{k:02d}"))

    latencies: list[list[float]] = [[] for _ in range(WRITERS)]
    errors: list[BaseException] = []
    barrier = threading.Barrier(WRITERS)

    def writer(k: int) -> None:
        login, sid, group = sessions[k]
        try:
            a = PostgresArchive(pg_server.url(login, database=name))
            rows = [reading_row(sid, j, group=group) for j in range(MAX_PER_WRITER)]
            barrier.wait()
            stop = time.perf_counter() + SECONDS
            for row in rows:
                t0 = time.perf_counter()
                a.append_reading(row)
                latencies[k].append(time.perf_counter() - t0)
                if t0 > stop:
                    break
            a.close()
        except BaseException as exc:
            errors.append(exc)

    threads = [threading.Thread(target=writer, args=(k,)) for k in range(WRITERS)]
    t0 = time.perf_counter()
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    wall = time.perf_counter() - t0
    assert errors == [], errors[:1]
    flat = [x for lat in latencies for x in lat]
    with psycopg.connect(pg_server.url("bench_ta", database=name)) as conn:
        stored = conn.execute("SELECT count(*) FROM labkit.readings").fetchone()[0]
    assert stored == len(flat)
    print(f"\nBENCH postgres 16 writers: {len(flat)} readings in {wall:.2f} s = {len(flat) / wall:.0f} readings/s; "
          f"latency p50 {1000 * statistics.median(flat):.1f} ms, p99 {1000 * _p(flat, 0.99):.1f} ms "
          "(targets >= 500 readings/s, p99 <= 50 ms)")

    # peer: plain INSERTs, no row security, no trigger, executemany in 10-row transactions
    pg_server.superuser_sql("CREATE TABLE plain_readings AS SELECT * FROM labkit.readings WITH NO DATA; "
                            "GRANT INSERT ON plain_readings TO bench_ta", database=name)
    cols = [c for c in reading_row("x") if c != "recorded_by"]
    insert = (f"INSERT INTO plain_readings ({', '.join(f'{chr(34)}{c}{chr(34)}' for c in cols)}, seq, recorded_by, "
              f"content_sha256) VALUES ({', '.join(['%s'] * len(cols))}, 0, 'x', 'x')")
    peer_lat: list[float] = []
    peer_lock = threading.Lock()

    def peer(k: int) -> None:
        with psycopg.connect(pg_server.url("bench_ta", database=name), autocommit=False) as conn:
            rows = [[reading_row(sessions[k][1], j)[c] for c in cols] for j in range(MAX_PER_WRITER)]
            stop = time.perf_counter() + SECONDS
            for i in range(0, len(rows), 10):
                t0 = time.perf_counter()
                with conn.cursor() as cur:
                    cur.executemany(insert, rows[i:i + 10])
                conn.commit()
                with peer_lock:
                    peer_lat.append(time.perf_counter() - t0)
                if t0 > stop:
                    break

    threads = [threading.Thread(target=peer, args=(k,)) for k in range(WRITERS)]
    t0 = time.perf_counter()
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    wall_peer = time.perf_counter() - t0
    n_peer = 10 * len(peer_lat)
    print(f"BENCH peer plain INSERT executemany (10 rows/commit, 16 threads): {n_peer / wall_peer:.0f} rows/s; "
          f"commit latency p99 {1000 * _p(peer_lat, 0.99):.1f} ms")

    # push of 100 hand-in files
    handins = []
    for k in range(100):
        lite = SQLiteArchive(tmp_path / f"laptop{k}.sqlite")
        sid = uuid.uuid4().hex
        lite.create_session(session_row(sid, group=f"G{k % WRITERS:02d}", state="open"))
        lite.append_readings([reading_row(sid, j, group=f"G{k % WRITERS:02d}") for j in range(5)])
        handins.append(lite.hand_in(tmp_path / f"laptop{k}.handin"))
        lite.close()
    t0 = time.perf_counter()
    reports = [ta.push(p) for p in handins]
    first = time.perf_counter() - t0
    t0 = time.perf_counter()
    again = [ta.push(p) for p in handins]
    second = time.perf_counter() - t0
    assert sum(r.merged_rows for r in reports) == 100 * 6
    assert all(r.already_pushed for r in again)
    print(f"BENCH archive push of 100 hand-in files: {first:.2f} s ({1000 * first / 100:.1f} ms/file); "
          f"pushing them again (skipped by hash): {second:.2f} s")
    ta.close()
