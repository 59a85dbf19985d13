"""Review across sessions on small invented logs (DEMO DATA) whose answers are counted by hand.

Outside references: scipy.stats.median_abs_deviation (the MAD of the modified z-score of Iglewicz and
Hoaglin, 1993: M = 0.6745 (x - median) / MAD, outlier below -3.5), scipy.stats.theilslopes (Sen's slope
and its interval), and hand counts written beside each case.
"""

from __future__ import annotations

import itertools
import uuid

import numpy as np
import pandas as pd
import pytest
from scipy.stats import median_abs_deviation, theilslopes

from labkit.report.common import ReportError, reading_frame
from labkit.report.review import MODIFIED_Z, ReviewFilter, modified_z, review, review_report
from tests.test_report_data import T0, session_row, sessions_frame

_seq = itertools.count(1)


def reading(session: dict, step: str, location: str, qty: str, verdict: str, *, predicted: float = 100.0,
            measured: float | None = None, rid: str | None = None, revision: int = 0, code: str = "") -> dict:
    return {
        "reading_id": rid or uuid.uuid4().hex, "revision": revision, "supersedes": revision - 1,
        "session_id": session["session_id"], "section": session["section"], "group": session["group"],
        "cart": session["cart"], "step_id": step, "step_index": 0, "step_kind": "free_reading",
        "location": location, "quantity": qty, "unit": "V", "predicted": predicted,
        "band_low": predicted * 0.98, "band_high": predicted * 1.02, "tolerance": 1.0,
        "measured": predicted if measured is None else measured, "entered": "", "form": "rms",
        "meter_range": np.nan, "obtained": "typed", "sensor": "", "verdict": verdict,
        "diagnosis": "looks like peak" if code else "", "diagnosis_code": code, "anchor": "nominal",
        "capture_id": "", "recorded_at": session["created_at"], "seq": next(_seq), "recorded_by": "p-1",
        "reason": "fix" if revision else "", "note": "",
    }


def hand_counted_session(s: dict) -> list[dict]:
    """k1: corrected outside -> accept; k2: re-read outside -> accept; k3: accept; k4: unchecked."""
    r1 = uuid.uuid4().hex
    return [
        reading(s, "step1", "B1", "v_rms", "outside", measured=120.0, rid=r1, code="peak_for_rms"),
        reading(s, "step1", "B1", "v_rms", "accept", measured=100.5, rid=r1, revision=1),
        reading(s, "step1", "L12@B1", "i_rms", "outside", measured=80.0, code="wrong_range"),
        reading(s, "step1", "L12@B1", "i_rms", "accept", measured=99.0),
        reading(s, "step2", "B2", "v_rms", "accept", measured=101.0),
        reading(s, "step2", "B2", "phase", "unchecked", predicted=-20.0, measured=-23.0),
    ]


def test_first_attempt_final_and_retries_by_hand() -> None:
    s = session_row("h1")
    res = review(sessions_frame([s]), reading_frame(hand_counted_session(s)))
    sess = res.tables["sessions"].iloc[0]
    assert sess["keys"] == 4
    assert sess["first_pass_rate"] == pytest.approx(1 / 3)  # k3 only, of k1..k3 (k4 unchecked)
    assert sess["final_pass_rate"] == pytest.approx(1.0)
    assert sess["retries"] == 2  # one correction (k1) + one repeated reading (k2)
    steps = res.tables["steps"].set_index(["step_id", "quantity"])
    assert steps.loc[("step1", "v_rms"), "first_pass"] == 0
    assert steps.loc[("step1", "v_rms"), "final_pass"] == 1
    assert steps.loc[("step1", "i_rms"), "retries"] == 1
    assert steps.loc[("step2", "v_rms"), "first_pass_rate"] == 1.0
    assert np.isnan(steps.loc[("step2", "phase"), "final_pass_rate"])
    # errors from the newest revision of every reading: v_rms 0.005 (corrected) and 0.01; phase in degrees
    assert sorted(res.errors["v_rms"]) == pytest.approx([0.005, 0.01])
    assert sorted(res.errors["i_rms"]) == pytest.approx([-0.2, -0.01])
    assert list(res.errors["phase"]) == pytest.approx([-3.0])
    # diagnoses: counted on the newest revision, so the corrected reading's code is gone
    assert list(res.tables["diagnoses"]["diagnosis_code"]) == ["wrong_range"]


def _session_with_rate(sid: str, section: str, n_pass: int, n: int = 20, **kw: object) -> tuple[dict, list[dict]]:
    s = session_row(sid, section=section, **kw)
    rows = [reading(s, f"step{k}", "B1", "v_rms", "accept" if k < n_pass else "outside") for k in range(n)]
    return s, rows


def test_modified_z_against_scipy_mad_and_outlier_flag() -> None:
    passes = [20, 20, 19, 18, 20, 19, 4]
    made = [_session_with_rate(f"z{k}", "A", p) for k, p in enumerate(passes)]
    made += [_session_with_rate(f"y{k}", "B", p) for k, p in enumerate([10, 11, 12])]
    res = review(sessions_frame([m[0] for m in made]), reading_frame([r for m in made for r in m[1]]))
    sess = res.tables["sessions"].set_index("session_id")
    x = np.array(passes) / 20
    want = MODIFIED_Z * (x - np.median(x)) / median_abs_deviation(x, scale=1.0)  # reference MAD: scipy
    got = sess.loc[[f"z{k}" for k in range(len(passes))], "modified_z"].to_numpy()
    assert got == pytest.approx(want)
    assert list(sess.index[sess["stands_out"]]) == ["z6"]  # 4/20 against a section median of 19/20
    assert not sess.loc[["y0", "y1", "y2"], "stands_out"].any()  # judged within its own section
    # all equal but one: MAD = 0, the mean-absolute-deviation fallback still scores it
    z = modified_z(np.array([1.0, 1.0, 1.0, 1.0, 0.2]))
    assert z[-1] < -3.5
    assert np.all(z[:-1] == 0)


def test_sections_and_dates_compared() -> None:
    made = [_session_with_rate("d1", "A", 20, created_at=T0), _session_with_rate("d2", "A", 10, created_at=T0 +
                                                                                 pd.Timedelta(days=7)),
            _session_with_rate("d3", "B", 15, created_at=T0)]
    res = review(sessions_frame([m[0] for m in made]), reading_frame([r for m in made for r in m[1]]))
    sec = res.tables["sections"].set_index("section")
    assert sec.loc["A", "final_pass_rate"] == pytest.approx(30 / 40)
    assert sec.loc["B", "sessions"] == 1
    sd = res.tables["section_dates"]
    a = sd[sd["section"] == "A"].sort_values("date")
    assert list(a["final_pass_rate"]) == pytest.approx([1.0, 0.5])
    assert list(a["date"]) == [T0.normalize(), (T0 + pd.Timedelta(days=7)).normalize()]


def test_filters_and_demo_exclusion() -> None:
    made = [_session_with_rate("f1", "A", 20, cart="c1", created_at=T0),
            _session_with_rate("f2", "B", 20, cart="c2", created_at=T0 + pd.Timedelta(days=2)),
            _session_with_rate("f3", "A", 20, cart="c1", created_at=T0 + pd.Timedelta(days=5)),
            _session_with_rate("f4", "A", 20, cart="c1", kind="demo"),
            _session_with_rate("f5", "A", 20, cart="c1", kind="practice")]
    sessions = sessions_frame([m[0] for m in made])
    readings = reading_frame([r for m in made for r in m[1]])

    def ids(**kw: object) -> set[str]:
        return set(review(sessions, readings, ReviewFilter(**kw)).tables["sessions"]["session_id"])

    assert ids() == {"f1", "f2", "f3"}
    assert ids(include_demo=True) == {"f1", "f2", "f3", "f4", "f5"}
    assert ids(section="A") == {"f1", "f3"}
    assert ids(cart="c2") == {"f2"}
    assert ids(date_from="2026-10-06", date_to="2026-10-07") == {"f2"}  # a bare end date includes its day
    assert ids(date_to=str(T0.date())) == {"f1"}
    assert ids(template="no-such-template") == set()
    with pytest.raises(ReportError, match="--from"):
        review(sessions, readings, ReviewFilter(date_from="next tuesday"))
    with pytest.raises(ReportError, match="missing column"):
        review(sessions, readings.drop(columns=["seq"]))


def test_template_version_differences_flagged() -> None:
    made = [_session_with_rate(f"v{k}", "A", 20) for k in range(3)]
    odd = _session_with_rate("v-odd", "A", 20, template_version="0.9")
    res = review(sessions_frame([m[0] for m in made] + [odd[0]]),
                 reading_frame([r for m in [*made, odd] for r in m[1]]))
    tv = res.tables["template_versions"]
    assert list(tv["session_id"]) == ["v-odd"]
    assert tv["usual_version"].iloc[0] == "1.0"
    sess = res.tables["sessions"].set_index("session_id")
    assert sess.loc["v-odd", "template_differs"]
    assert not sess.loc["v0", "template_differs"]


def test_drifting_and_off_carts_found() -> None:
    rng = np.random.default_rng(5)
    sessions, rows = [], []
    for day in range(0, 40, 2):
        for cart, err in (("c-drift", 0.001 * day), ("c-stable", rng.normal(0, 0.002)), ("c-off", 0.08)):
            s = session_row(f"{cart}-{day}", cart=cart, created_at=T0 + pd.Timedelta(days=day))
            sessions.append(s)
            rows.append(reading(s, "step1", "B1", "v_rms", "accept", measured=100.0 * (1 + err)))
    res = review(sessions_frame(sessions), reading_frame(rows))
    carts = res.tables["carts"].set_index("cart")
    assert carts.loc["c-drift", "drifting"]
    assert not carts.loc["c-stable", "drifting"]
    assert carts.loc["c-off", "off"]
    assert not carts.loc["c-off", "drifting"]
    assert not carts.loc["c-drift", "off"]  # recent median 0.035-0.038 < 5 %
    # reference: Sen's slope of the same daily series from scipy
    days = np.arange(0, 40, 2, dtype=float)
    slope, *_ = theilslopes(0.001 * days, days, alpha=0.95)
    assert carts.loc["c-drift", "slope_per_day"] == pytest.approx(slope)
    assert carts.loc["c-drift", "slope_per_day"] == pytest.approx(0.001)


def test_review_page_renders_histograms_and_escapes_names() -> None:
    payload = "<script>window.__pwned=1</script>"
    made = [_session_with_rate("p1", payload, 18), _session_with_rate("p2", payload, 20)]
    res = review(sessions_frame([m[0] for m in made]), reading_frame([r for m in made for r in m[1]]))
    rep = review_report(res)
    assert payload not in rep.html
    assert "&lt;script&gt;window.__pwned=1&lt;/script&gt;" in rep.html
    assert 'aria-label="v_rms"' in rep.html
    assert set(rep.tables) >= {"sessions", "steps", "errors", "diagnoses", "sections", "carts"}
    assert "series_days" not in rep.tables["carts"].columns


def test_progress_calls() -> None:
    s = session_row("pr")
    calls: list[tuple[int, int, str]] = []
    review(sessions_frame([s]), reading_frame(hand_counted_session(s)), progress=lambda *a: calls.append(a))
    assert calls[0][0] == 0
    assert calls[-1][0] == calls[-1][1]
    assert [c[0] for c in calls] == sorted(c[0] for c in calls)
