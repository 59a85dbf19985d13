"""``labkit archive migrate|roles|push|purge`` against the throwaway server (exit codes, messages, no secrets).

Outside reference: libpq reads ``PGPASSWORD`` from the environment (PostgreSQL documentation,
"Environment Variables", recalled from memory); the rest is checked against the server's own tables.
"""

from __future__ import annotations

import argparse
import uuid

import pytest

from labkit.cli.server import add_server_parsers
from tests.pg_support import pg_server  # noqa: F401
from tests.reliability.factory import reading_row, session_row

pytest.importorskip("psycopg")


def _run(argv: list[str]) -> int:
    parser = argparse.ArgumentParser(prog="labkit")
    add_server_parsers(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args(argv)
    return int(args.func(args))


def test_cli_migrate_roles_push_purge(pg_server, tmp_path, capsys, monkeypatch):  # noqa: F811
    from labkit.logbook.postgres import PostgresArchive
    from labkit.logbook.sqlite import SQLiteArchive

    name = f"cli_{uuid.uuid4().hex[:8]}"
    owner = pg_server.fresh_database(name)
    assert _run(["archive", "migrate", owner]) == 0
    assert "up to date" in capsys.readouterr().out
    monkeypatch.setenv("LABKIT_TA_PW", "cli-ta-pw-81x")
    login = f"cli_ta_{uuid.uuid4().hex[:6]}"
    assert _run(["archive", "roles", owner, "--add", login, "--role", "ta", "--section", "S01",
                 "--password-env", "LABKIT_TA_PW"]) == 0
    out = capsys.readouterr().out
    assert login in out
    assert "cli-ta-pw-81x" not in out
    prof = f"cli_prof_{uuid.uuid4().hex[:6]}"
    monkeypatch.setenv("LABKIT_PROF_PW", "cli-prof-pw-33q")
    assert _run(["archive", "roles", owner, "--add", prof, "--role", "instructor", "--password-env",
                 "LABKIT_PROF_PW"]) == 0
    assert _run(["archive", "roles", owner, "--add", "x", "--role", "student"]) == 2  # no section/group
    assert "needs a section and a group" in capsys.readouterr().err

    lite = SQLiteArchive(tmp_path / "laptop.sqlite")
    sid = uuid.uuid4().hex
    lite.create_session(session_row(sid, state="open"))
    lite.append_reading(reading_row(sid, 0))
    handin = lite.hand_in(tmp_path / "laptop.handin")
    lite.close()
    ta_url = f"postgresql://{login}@127.0.0.1:{pg_server.port}/{name}"
    monkeypatch.setenv("PGPASSWORD", "cli-ta-pw-81x")
    assert _run(["archive", "push", str(handin), ta_url]) == 0
    assert "2 rows added" in capsys.readouterr().out
    assert _run(["archive", "push", str(handin), ta_url]) == 0
    assert "already pushed" in capsys.readouterr().out
    monkeypatch.setenv("LABKIT_ARCHIVE", ta_url)
    assert _run(["archive", "push", "--url-from-env", str(handin)]) == 0
    assert "already pushed" in capsys.readouterr().out

    monkeypatch.setenv("PGPASSWORD", "wrong-pw-zz9")
    assert _run(["archive", "push", str(handin), ta_url]) == 2
    err = capsys.readouterr().err
    assert "cannot connect" in err
    assert "wrong-pw-zz9" not in err

    monkeypatch.setenv("PGPASSWORD", "cli-prof-pw-33q")
    prof_url = f"postgresql://{prof}@127.0.0.1:{pg_server.port}/{name}"
    assert _run(["archive", "purge", prof_url, sid, "--reason", "invented demo erasure request"]) == 0
    assert "purged" in capsys.readouterr().out
    a = PostgresArchive(prof_url)
    assert a.readings(sid).empty
    assert [e["session_id"] for e in a.purge_log()] == [sid]
    a.close()
