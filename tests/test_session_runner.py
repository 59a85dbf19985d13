"""The session runner: the role/state transition table, steps, as-found anchoring, recording, resume, roster.

Outside references: the transition table is the project's documented rule (docs/verdicts.md, labkit.session.runner)
and every (from, to, role) combination is checked against it; the instrument tolerance a recorded row carries is
checked against the meter-accuracy rule of /work/shared/field-reference.md §4.2, computed by hand.
"""

from __future__ import annotations

import itertools
import json
import math

import pytest

from labkit.core.errors import FileValidationError
from labkit.files.loader import load_bench, load_template
from labkit.logbook.storage import NotRecordedError
from labkit.session.roster import import_roster, read_roster
from labkit.session.runner import STATES, TRANSITIONS, Actor, SessionError, SessionRunner
from tests.conftest import DEMO
from tests.test_session_archive import MemoryArchive

STUDENT, TA, INSTRUCTOR = Actor("p01", "student"), Actor("ta1", "ta"), Actor("in1", "instructor")
ACTORS = {"student": STUDENT, "ta": TA, "instructor": INSTRUCTOR}
SAMPLES = 100


@pytest.fixture(scope="module")
def loaded():
    bench = load_bench(DEMO / "demo-bench.toml", DEMO / "demo-cart-03.toml")
    return bench, {name: load_template(DEMO / f"{name}.toml", bench.bench)
                   for name in ("lab1-line-and-loads", "lab2-synchronize", "lab3-harmonics")}


def _runner(loaded, template="lab1-line-and-loads", archive=None):
    bench, templates = loaded
    return SessionRunner.create(archive or MemoryArchive(), bench, templates[template], section="S1", group="G1",
                                people=["p01", "p02"], actor=STUDENT, n_samples=SAMPLES)


# -- transitions -------------------------------------------------------------------------------------------------
# the documented table (docs/verdicts.md), written out again here so that a change to the code's table shows
DOCUMENTED = {
    ("planned", "open"): {"student", "ta", "instructor"},
    ("open", "submitted"): {"student", "ta", "instructor"},
    ("submitted", "open"): {"ta", "instructor"},
    ("submitted", "closed"): {"ta", "instructor"},
    ("open", "closed"): {"instructor"},
}


def test_code_table_is_the_documented_table():
    assert {k: set(v) for k, v in TRANSITIONS.items()} == DOCUMENTED


@pytest.mark.parametrize(("start", "to", "role"), list(itertools.product(STATES, STATES, ACTORS)))
def test_every_transition_is_allowed_or_refused_by_the_table(loaded, start, to, role):
    r = _runner(loaded)
    r.state_name = start  # put the session in the start state without events
    before = len(r.archive.events(r.session_id))
    if role in DOCUMENTED.get((start, to), set()):
        ev = r.transition(to, actor=ACTORS[role])
        assert ev["event"] == f"state:{to}"
        assert r.state_name == to
        assert len(r.archive.events(r.session_id)) == before + 1
    else:
        with pytest.raises(SessionError):
            r.transition(to, actor=ACTORS[role])
        assert r.state_name == start
        assert len(r.archive.events(r.session_id)) == before  # nothing logged for a refused change


def test_readings_and_steps_need_an_open_session_and_a_student_present(loaded):
    r = _runner(loaded)
    with pytest.raises(SessionError, match="open the session first"):
        r.forward()
    r.open()
    with pytest.raises(SessionError, match="not among the people present"):
        r.forward(actor=Actor("p99", "student"))
    parsed = r.parse(0, "120.1 V")
    r.submit()
    with pytest.raises(SessionError, match="submitted"):
        r.record(parsed)


def test_a_closed_session_takes_only_staff_corrections_with_a_reason(loaded):
    r = _runner(loaded)
    r.open()
    row = r.record(r.parse(0, "120.1 V"))
    r.submit()
    r.close(actor=TA)
    parsed = r.parse(0, "120.0 V")  # parsing needs no open session: only recording does
    with pytest.raises(SessionError, match="record a reading"):
        r.record(parsed, actor=TA)
    with pytest.raises(SessionError, match="only a ta or instructor"):
        r.correct(row["reading_id"], parsed, reason="typo", actor=STUDENT)
    with pytest.raises(SessionError, match="reason"):
        r.correct(row["reading_id"], parsed, reason=" ", actor=TA)
    fix = r.correct(row["reading_id"], parsed, reason="meter read 120.0 V, typed 120.1", actor=TA)
    assert (fix["revision"], fix["supersedes"], fix["reading_id"]) == (1, 0, row["reading_id"])
    assert fix["recorded_by"] == "ta1"
    assert fix["reason"]
    latest = r.archive.readings(r.session_id, latest_only=True)
    assert list(latest["measured"]) == [pytest.approx(120.0)]


# -- steps, as-found values, verdicts ---------------------------------------------------------------------------
def test_walk_skip_and_back_are_events_and_skipped_changes_are_not_made(loaded):
    r = _runner(loaded)
    r.open()
    r.forward()
    r.forward()  # at resistive-load
    assert r.view().step.id == "resistive-load"
    r.skip("resistive bank out of order")
    assert r.skipped == {2: "resistive bank out of order"}
    assert r.state_at(3).load_step("RB") == 0  # the skipped load step was not made
    r.back()
    assert r.current == 2
    r.forward()  # going forward from it performs it
    assert r.state_at(3).load_step("RB") == 2
    assert r.skipped == {}
    names = list(r.archive.events(r.session_id)["event"])
    assert names == ["state:open", "step:forward", "step:forward", "step:skip", "step:back", "step:forward"]
    skip = json.loads(r.archive.events(r.session_id)["detail"].iloc[3])
    assert skip["reason"] == "resistive bank out of order"
    with pytest.raises(SessionError, match="reason"):
        r.skip("")


def test_as_found_source_values_anchor_later_steps(loaded):
    r = _runner(loaded)
    r.open()
    nominal_b2 = r.view(2).expected[0].predicted
    af = r.set_as_found("117.0 V", "59.95 Hz")
    assert af.v_rms == pytest.approx(117.0)
    assert r.archive.events(r.session_id)["event"].iloc[-1] == "anchor"
    first = r.record(r.parse(0, "117.0 V"))
    assert first["anchor"] == "nominal"  # the source_start step's own readings: nominal source
    later = r.view(2)
    assert later.anchor.startswith("as-found REF")
    # a linear bench fed from one source scales with its EMF
    assert later.expected[0].predicted == pytest.approx(nominal_b2 * 117.0 / r.view(0).expected[0].predicted,
                                                         rel=2e-3)
    assert later.prediction.value("B1", "frequency") == pytest.approx(59.95)
    r.forward()
    with pytest.raises(SessionError, match="source_start"):
        r.set_as_found("117 V", "60 Hz")


def test_recorded_row_carries_the_instrument_tolerance_and_verdict(loaded):
    r = _runner(loaded)
    r.open()
    row = r.record(r.parse(0, "118.6 V"))
    # field-reference §4.2 by hand for sensor VA: 0.002 * 200 V + 0.005 * 118.6 V + 2 * 0.1 V
    assert row["tolerance"] == pytest.approx(0.4 + 0.593 + 0.2, abs=1e-9)
    assert row["verdict"] == "marginal"  # 1.43 V below the nominal 120.03 V: more than 1.193, less than 3 x
    assert row["sensor"] == ""
    assert "sensor VA" in row["note"]
    assert row["predicted"] == pytest.approx(r.view(0).expected[0].predicted)
    assert (row["seq"], row["revision"], row["supersedes"]) == (2, 0, -1)


def test_sync_and_frequency_predictions_on_the_alternator_lab(loaded):
    r = _runner(loaded, "lab2-synchronize")
    r.open()
    for _ in range(3):
        r.forward()
    sync = r.view()
    assert sync.step.kind == "synchronize"
    assert sync.sync is not None
    # incoming minus running: G1 runs at its 60.1 Hz setpoint, the mains at 60 Hz
    assert sync.sync.slip_hz == pytest.approx(0.1, abs=1e-6)
    assert sync.expected[0].predicted == pytest.approx(0.1, abs=1e-6)  # slip reading before closing
    r.forward()
    load = r.view()
    assert load.frequency is not None
    assert load.frequency.values["frequency"] == pytest.approx(60.0)
    assert "mains reference holds the frequency" in load.frequency.lines[0]


# -- NotRecordedError and resume ---------------------------------------------------------------------------------
def test_not_recorded_keeps_the_value_and_retry_commits_it(loaded):
    r = _runner(loaded)
    r.open()
    parsed = r.parse(0, "119.9 V")
    r.archive.fail_next = 1
    with pytest.raises(NotRecordedError):
        r.record(parsed)
    assert r.archive.readings(r.session_id).empty
    [pending] = r.not_recorded
    assert pending.parsed.entered == "119.9 V"
    assert pending.status == "not recorded"
    assert "disk full" in pending.error
    row = r.retry(pending)
    assert row["measured"] == pytest.approx(119.9)
    assert not r.not_recorded
    assert len(r.archive.readings(r.session_id)) == 1


def test_resume_after_restart_is_exactly_where_it_was(loaded):
    r = _runner(loaded)
    r.open()
    r.set_as_found("118.2 V", "59.97 Hz")
    r.record(r.parse(0, "118.2 V"))
    r.forward()
    r.forward()
    r.record(r.simulate(0))
    r.record(r.simulate(2))
    r.skip("ran out of time", applied=True)
    resumed = SessionRunner.resume(r.archive, r.session_id, STUDENT)
    assert resumed.state_name == "open"
    assert resumed.current == r.current == 3
    assert resumed.skipped == r.skipped
    assert resumed.anchors.keys() == r.anchors.keys()
    assert resumed.anchors["REF"].emf_scale == pytest.approx(r.anchors["REF"].emf_scale, rel=1e-12)
    assert resumed.state_at(3) == r.state_at(3)
    a, b = r.view(), resumed.view()
    assert [e.predicted for e in a.expected] == pytest.approx([e.predicted for e in b.expected], rel=1e-12)
    assert a.anchor == b.anchor
    fa, fb = r.readings_frame(), resumed.readings_frame()
    assert list(fa["reading_id"]) == list(fb["reading_id"])
    assert list(fa["measured"]) == pytest.approx(list(fb["measured"]))
    resumed.record(resumed.simulate(0))  # and it carries on
    assert resumed.archive.readings(r.session_id)["seq"].is_monotonic_increasing


def test_runner_works_on_the_sqlite_archive(loaded, tmp_path):
    sqlite = pytest.importorskip("labkit.logbook.sqlite")
    archive = sqlite.SQLiteArchive(tmp_path / "log.sqlite")
    r = _runner(loaded, archive=archive)
    r.open()
    row = r.record(r.parse(0, "120.2 V"))
    r.forward()
    archive.close()
    again = sqlite.SQLiteArchive(tmp_path / "log.sqlite")
    resumed = SessionRunner.resume(again, r.session_id, STUDENT)
    assert resumed.current == 1
    assert resumed.state_name == "open"
    assert resumed.readings_frame()["reading_id"].tolist() == [row["reading_id"]]
    again.close()


# -- roster -------------------------------------------------------------------------------------------------------
ROSTER = """participant_id,name,section,group,role
p01,Student One (invented),S1,G1,student
p02,Student Two (invented),S1,G1,student
p03,Student Three (invented),S1,G2,student
p04,Student Four (invented),S2,G1,student
ta1,Assistant (invented),S1,,ta
"""


def test_roster_import_creates_a_sections_sessions_in_one_batch(loaded):
    bench, templates = loaded
    archive = MemoryArchive()
    runners = import_roster(archive, read_roster(ROSTER, name="roster.csv"), bench, templates["lab1-line-and-loads"],
                            section="S1", actor=TA, carts={"G2": "cart-07"}, n_samples=SAMPLES)
    assert [(x.session["group"], x.people, x.session["cart"]) for x in runners] == [
        ("G1", ["p01", "p02"], "cart-03"), ("G2", ["p03"], "cart-07")]
    assert set(archive.sessions()["state"]) == {"planned"}
    assert len(archive.roster()) == 5
    assert "Student" not in archive.sessions().to_string()  # names stay in the roster table
    with pytest.raises(SessionError, match="staff"):
        import_roster(archive, read_roster(ROSTER, name="r.csv"), bench, templates["lab1-line-and-loads"],
                      section="S1", actor=STUDENT)


def test_roster_problems_are_reported_with_their_lines():
    bad = "participant_id,name,section,group,role\np01,A,S1,G1,student\np01,B,S1,,student\np03,C,S1,G1,tutor\n"
    with pytest.raises(FileValidationError) as err:
        read_roster(bad, name="roster.csv")
    text = str(err.value)
    assert "roster.csv:3" in text
    assert "already used on line 2" in text
    assert "needs a group" in text
    assert "roster.csv:4" in text
    assert "unknown role" in text
    with pytest.raises(FileValidationError, match="roster header"):
        read_roster("id,name\n", name="r.csv")


def test_session_row_pins_the_versions_and_texts(loaded):
    r = _runner(loaded)
    s = r.archive.sessions().iloc[0]
    assert s["template_id"] == "lab1-line-and-loads"
    assert s["bench_id"] == "demo-bench"
    assert s["cart"] == "cart-03"
    assert s["template_text"].startswith("# labkit session template")
    assert len(s["bench_sha256"]) == 64
    assert s["cart_text"]
    assert s["mc_samples"] == SAMPLES
    assert not math.isnan(s["mc_seed"])
