"""The section overview's data layer on both backends and offline from hand-in files.

The expected values are built into the invented demo rows below (common practice: the overview is a
summary of the log, so each figure is counted by hand from the rows written here); the step replay is
checked against the session runner's own rule (last move's ``to``), the SQLite backend is the other
developer's implementation of the same protocol.
"""

from __future__ import annotations

import json
import uuid
from pathlib import Path

import pytest

from labkit.logbook.overview import OverviewRefresher, overview_from_hand_ins, section_overview
from labkit.logbook.sqlite import SQLiteArchive
from tests.pg_support import pg_server  # noqa: F401
from tests.reliability.factory import correction_of, reading_row, session_row, sha

TEMPLATE = ('[template]\nid = "demo-lab"\nversion = "1"\ntitle = "Invented demo lab"\n'
            '[[steps]]\nid = "start"\ntitle = "Start the reference source"\n'
            '[[steps]]\nid = "sync-g1"\ntitle = "Synchronize G1"\n'
            '[[steps]]\nid = "load"\ntitle = "Add load"\n')


def _fill(archive, section: str = "S01") -> dict[str, str]:
    """G1: at step 2, one outside reading left, one corrected, a 120 % loading, two sync attempts. G2: planned."""
    g1, g2 = uuid.uuid4().hex, uuid.uuid4().hex
    for sid, group in ((g1, "G1"), (g2, "G2")):
        archive.create_session(session_row(sid, section=section, group=group, state="planned",
                                           template_text=TEMPLATE, template_sha256=sha(TEMPLATE)))
    ev = {"session_id": g1, "by": "ta_1", "role": "ta"}
    archive.append_event({**ev, "event": "state:open"})
    for a, b in ((0, 1), (1, 2)):
        archive.append_event({**ev, "event": "step:forward", "step_id": "x",
                              "detail": json.dumps({"from": a, "to": b})})
    common = {"section": section, "group": "G1"}
    bad = archive.append_reading(reading_row(g1, 0, verdict="outside", measured=200.0, **common))
    archive.append_reading(correction_of(bad, 229.0) | {"verdict": "accept"})
    archive.append_reading(reading_row(g1, 2, verdict="outside", measured=250.0, diagnosis="meter on the wrong range",
                                       **common))
    archive.append_reading(reading_row(g1, 2, quantity="loading", unit="%", measured=120.0, location="L1",
                                       **common))
    for k, verdict in ((1, "outside"), (1, "accept")):
        archive.append_reading(reading_row(g1, k, step_kind="synchronize", step_id="sync-g1", quantity="slip",
                                           unit="Hz", measured=0.3 if verdict == "outside" else 0.05,
                                           verdict=verdict, **common))
    return {"G1": g1, "G2": g2}


def _check(ov, ids: dict[str, str]) -> None:
    g1 = ov.group("S01", "G1")
    assert g1.session_id == ids["G1"]
    assert g1.state == "open"
    assert (g1.step_index, g1.step_id, g1.step_title, g1.n_steps) == (2, "load", "Add load", 3)
    assert [o.measured for o in g1.outside] == [250.0, 0.3]  # the corrected one is no longer outstanding
    assert g1.outside[0].diagnosis == "meter on the wrong range"
    assert g1.rating_warnings == ["L1 measured at 120 % of its rated current (step step-2)"]
    assert [(a.quantity, a.verdict) for a in g1.sync_attempts] == [("slip", "outside"), ("slip", "accept")]
    assert g1.readings == 5
    g2 = ov.group("S01", "G2")
    assert (g2.state, g2.step_index, g2.readings, g2.outside) == ("planned", 0, 0, [])


def test_overview_from_a_sqlite_archive(tmp_path: Path):
    archive = SQLiteArchive(tmp_path / "a.sqlite")
    ids = _fill(archive)
    _check(section_overview(archive, "S01"), ids)
    assert section_overview(archive, "S99").groups == []
    archive.close()


def test_overview_offline_from_hand_ins(tmp_path: Path):
    first = SQLiteArchive(tmp_path / "laptop1.sqlite")
    ids = _fill(first)
    h1 = first.hand_in(tmp_path / "laptop1.handin", [ids["G1"]])
    h2 = first.hand_in(tmp_path / "laptop2.handin", [ids["G2"]])
    first.close()
    ov = overview_from_hand_ins([h1, h2, h1], "S01")  # a file collected twice counts once
    _check(ov, ids)


def test_refresher_polls_without_blocking(tmp_path: Path):
    archive = SQLiteArchive(tmp_path / "a.sqlite")
    ids = _fill(archive)
    refresher = OverviewRefresher(lambda: section_overview(archive, "S01"), interval=30.0).start()
    try:
        assert refresher.wait_for(0)
        version, ov, error = refresher.latest()
        assert error == ""
        assert ov is not None
        assert ov.group("S01", "G1").readings == 5
        archive.append_reading(reading_row(ids["G1"], 9, section="S01", group="G1"))
        refresher.refresh_now()
        assert refresher.wait_for(version)
        assert refresher.latest()[1].group("S01", "G1").readings == 6
    finally:
        refresher.stop()
        archive.close()
    with pytest.raises(ValueError, match="positive"):
        OverviewRefresher(lambda: None, interval=0)


def test_overview_from_the_shared_server_follows_row_security(pg_server):  # noqa: F811
    from labkit.logbook.postgres import PostgresArchive, add_member

    name = f"ov_{uuid.uuid4().hex[:8]}"
    owner = pg_server.fresh_database(name)
    for login, role, section, group in (("ta_1", "ta", "S01", ""), ("ta_2", "ta", "S02", "")):
        pw = pg_server.passwords.get(login) or f"pw-{login}-9Tz"
        add_member(owner, login, role, section=section, group=group, password=pw)
        pg_server.passwords[login] = pw
    ta = PostgresArchive(pg_server.url("ta_1", database=name))
    ids = _fill(ta)
    _check(section_overview(ta), ids)
    other = PostgresArchive(pg_server.url("ta_2", database=name))
    assert section_overview(other).groups == []  # another section's TA sees none of it
    ta.close()
    other.close()
