"""``labkit demo`` (labkit.cli.session): a whole session on the simulated bench, recorded in a SQLite archive.

Checked against the run's own archive (what was printed is what was recorded) and against the seeded mistakes
it injects: every injected mistake must show as a reading that is not accepted (common practice: a peak read as
RMS, a reversed current sensor and a x10 probe setting each put a reading far outside its band).
"""

from __future__ import annotations

import argparse

import pytest

from labkit.cli.session import add_session_parsers


def _run(argv):
    parser = argparse.ArgumentParser()
    add_session_parsers(parser.add_subparsers())
    args = parser.parse_args(["demo", *argv])
    return args.func(args)


@pytest.mark.parametrize("template", ["lab1-line-and-loads", "lab2-synchronize", "lab3-harmonics"])
def test_demo_runs_a_whole_session_and_records_it(tmp_path, capsys, template):
    sqlite = pytest.importorskip("labkit.logbook.sqlite")
    path = tmp_path / "demo.sqlite"
    assert _run(["--template", template, "--archive", str(path), "--samples", "300"]) == 0
    out = capsys.readouterr().out
    assert "invented demo data" in out
    assert "summary" in out
    assert "counts:" in out
    assert "! " in out  # the implied cautions are printed with the steps
    archive = sqlite.SQLiteArchive(path)
    sessions = archive.sessions()
    assert list(sessions["kind"]) == ["demo"]
    assert list(sessions["state"]) == ["closed"]
    readings = archive.readings(latest_only=True)
    recorded = int(out.split(" readings recorded")[0].rsplit(" ", 1)[1])
    assert len(readings) == recorded == out.count(")  -> ")  # every reading printed was recorded
    assert set(readings["verdict"]) <= {"accept", "marginal", "outside", "unchecked"}
    injected = out.count("[injected:")
    assert injected >= 1
    assert (readings["verdict"].isin(["marginal", "outside"])).sum() >= injected
    assert "accept" in set(readings["verdict"])
    events = archive.events()
    assert {"state:open", "state:submitted", "state:closed", "anchor"} <= set(events["event"])
    archive.close()


def test_demo_refuses_an_unknown_template(tmp_path, capsys):
    assert _run(["--template", "no-such-lab", "--archive", str(tmp_path / "x.sqlite")]) == 1
    assert "no-such-lab" in capsys.readouterr().err
