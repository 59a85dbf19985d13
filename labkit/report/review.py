"""Review across sessions: pass rates per step and quantity, error distributions, outliers, carts over time.

:func:`review` works on whole log tables (``SESSION_COLUMNS`` and
``READING_COLUMNS`` rows, all revisions) with vectorized pandas/numpy steps,
so a semester of about a million readings takes seconds. Definitions:

* a *key* is one (session, step id, location, quantity): one thing a group had
  to measure; its *first attempt* is the verdict first recorded for its
  earliest reading (revision 0), its *final* verdict is the newest revision of
  its latest reading (by ``seq``);
* *retries* of a key: readings taken again (extra readings of the key) plus
  corrections (revisions > 0);
* a pass is a verdict in ``pass_verdicts`` (``accept`` by default); keys whose
  verdict is ``unchecked`` are left out of the rates;
* relative error is ``(measured - predicted) / |predicted|`` of the newest
  revision of every reading; angle quantities use the difference in degrees;
* a session *stands out* when its final pass rate has a modified z-score
  ``0.6745 (x - median) / MAD`` below ``-3.5`` within its section (Iglewicz and
  Hoaglin's outlier rule); when the MAD is 0 the mean absolute deviation times
  1.253314 is used instead (common practice);
* a cart's reading *drifts* when the Theil-Sen slope of its daily median
  relative error (per quantity and location) has a 95 % interval that excludes
  0 and moves it by more than ``drift_threshold`` over the dates seen; it is
  *off* when the median of its last three dates exceeds ``offset_threshold``.

Demo and practice sessions are left out unless ``include_demo``.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from labkit import __version__
from labkit.report.common import (
    Progress,
    ReportError,
    is_angle_quantity,
    no_progress,
    relative_error,
    require_columns,
    unit_of,
)
from labkit.report.html import esc, page, table
from labkit.report.session import Report
from labkit.report.svg import Series, histogram_svg, line_chart

MODIFIED_Z = 0.6745  # Iglewicz & Hoaglin (1993): 0.6745 = Phi^-1(0.75), makes the MAD consistent with sigma
MODIFIED_Z_LIMIT = -3.5  # their recommended cut-off for a potential outlier
MEAN_AD_FACTOR = 1.253314  # sqrt(pi/2): mean absolute deviation -> sigma for normal data (common practice)

_READING_NEEDED = ["reading_id", "revision", "session_id", "step_id", "location", "quantity", "predicted",
                   "measured", "verdict", "diagnosis", "diagnosis_code", "seq", "cart"]
_SESSION_NEEDED = ["session_id", "kind", "section", "group", "cart", "template_id", "template_version",
                   "template_sha256", "created_at"]


@dataclass
class ReviewFilter:
    """Which sessions a review covers (``None``: no restriction)."""

    section: str | None = None
    date_from: str | pd.Timestamp | None = None
    date_to: str | pd.Timestamp | None = None
    template: str | None = None
    cart: str | None = None
    include_demo: bool = False

    def describe(self) -> str:
        """The filter in words."""
        parts = [f"{k} = {v}" for k, v in (("section", self.section), ("from", self.date_from),
                                           ("to", self.date_to), ("template", self.template),
                                           ("cart", self.cart)) if v is not None]
        parts.append("demo and practice sessions included" if self.include_demo else "lab sessions only")
        return "; ".join(parts)


@dataclass
class ReviewResult:
    """Everything a review found, as tables (see :func:`review` for their columns)."""

    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    errors: dict[str, np.ndarray] = field(default_factory=dict)  # quantity -> relative (or angle) errors
    filter: ReviewFilter = field(default_factory=ReviewFilter)


def _day(value: str | pd.Timestamp | None, what: str, end: bool = False) -> pd.Timestamp | None:
    if value is None:
        return None
    try:
        ts = pd.Timestamp(value)
    except (ValueError, TypeError) as exc:
        msg = f"{what}: expected a date like 2026-10-05, found {value!r}"
        raise ReportError(msg) from exc
    ts = ts.tz_localize("UTC") if ts.tzinfo is None else ts.tz_convert("UTC")
    if end and ts == ts.normalize():
        ts = ts + pd.Timedelta(days=1) - pd.Timedelta(1, "ns")  # a bare date includes its whole day
    return ts


def select_sessions(sessions: pd.DataFrame, flt: ReviewFilter) -> pd.DataFrame:
    """The sessions the filter keeps."""
    require_columns(sessions, _SESSION_NEEDED, "sessions")
    keep = np.ones(len(sessions), dtype=bool)
    if not flt.include_demo:
        keep &= (sessions["kind"] == "lab").to_numpy(bool)
    for col, value in (("section", flt.section), ("template_id", flt.template), ("cart", flt.cart)):
        if value is not None:
            keep &= (sessions[col] == value).to_numpy(bool)
    created = pd.to_datetime(sessions["created_at"], utc=True)
    lo, hi = _day(flt.date_from, "--from"), _day(flt.date_to, "--to", end=True)
    if lo is not None:
        keep &= (created >= lo).to_numpy(bool)
    if hi is not None:
        keep &= (created <= hi).to_numpy(bool)
    return sessions.loc[keep].copy()


def modified_z(values: np.ndarray) -> np.ndarray:
    """Modified z-scores ``0.6745 (x - median) / MAD`` (mean-absolute-deviation fallback when MAD is 0)."""
    x = np.asarray(values, dtype=float)
    med = np.nanmedian(x) if np.isfinite(x).any() else np.nan
    mad = np.nanmedian(np.abs(x - med)) if np.isfinite(x).any() else np.nan
    with np.errstate(divide="ignore", invalid="ignore"):
        if mad > 0:
            return MODIFIED_Z * (x - med) / mad
        mean_ad = np.nanmean(np.abs(x - med)) if np.isfinite(x).any() else np.nan
        if mean_ad > 0:
            return (x - med) / (MEAN_AD_FACTOR * mean_ad)
    return np.zeros_like(x)


def review(sessions: pd.DataFrame, readings: pd.DataFrame, flt: ReviewFilter | None = None, *,
           pass_verdicts: Sequence[str] = ("accept",), drift_threshold: float = 0.02,
           offset_threshold: float = 0.05, progress: Progress = no_progress) -> ReviewResult:
    """Compute the review tables.

    Returns
    -------
    ReviewResult
        ``tables``: ``sessions`` (per session: keys, first/final pass rate, retries, modified z, flags),
        ``steps`` (per template, step id and quantity: keys, first-attempt and final pass rates, retries),
        ``errors`` (per quantity: count, median, 5th/95th percentile of the error), ``diagnoses`` (most
        frequent), ``sections`` (per section), ``section_dates`` (per section and day), ``carts`` (per cart,
        quantity and location: dates, slope per day, interval, flags), ``template_versions`` (sessions whose
        template version or hash differs from the template's usual one). ``errors`` (attribute): error values
        per quantity, for the histograms.
    """
    flt = flt or ReviewFilter()
    require_columns(readings, _READING_NEEDED, "readings")
    total = 6
    progress(0, total, "selecting sessions")
    chosen = select_sessions(sessions, flt)
    result = ReviewResult(filter=flt)
    sess_index = pd.Index(chosen["session_id"])
    positions = np.flatnonzero(readings["session_id"].isin(sess_index).to_numpy(bool))

    def coded(col: str, missing: str | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Integer codes of a text column's selected rows and its distinct values (missing -> ``missing``)."""
        codes, uniques = pd.factorize(readings[col])  # the whole column once: cheaper than filtering text
        uniques = np.asarray(uniques, dtype=object)
        codes = codes[positions].astype(np.int64)
        if missing is not None:  # archive frames hold nullable text
            hit = np.flatnonzero(uniques == missing)
            if hit.size:
                slot = int(hit[0])
            else:
                uniques, slot = np.append(uniques, missing), uniques.size
            codes = np.where(codes < 0, slot, codes)
        return codes, uniques

    progress(1, total, "latest revisions")
    rid, _ = coded("reading_id")
    rev = readings["revision"].to_numpy(np.int64)[positions]
    seq = readings["seq"].to_numpy(np.int64)[positions]
    order = np.lexsort((rev, rid))
    rid_sorted = rid[order]
    boundary = np.r_[True, rid_sorted[1:] != rid_sorted[:-1]] if rid.size else np.zeros(0, bool)
    first_of_reading = order[boundary]
    last = order[np.r_[boundary[1:], True]] if rid.size else order  # newest revision of every reading
    n_revisions = rev[last]
    first_seq = seq[first_of_reading]
    s_all, s_uni = coded("session_id")
    st_all, st_uni = coded("step_id", "")
    l_all, l_uni = coded("location", "")
    q_all, q_uni = coded("quantity", "")
    v_all, v_uni = coded("verdict", "unchecked")
    d_all, d_uni = coded("diagnosis_code", "")
    c_all, c_uni = coded("cart", "")
    s_code, st_code, l_code, q_code = s_all[last], st_all[last], l_all[last], q_all[last]
    first_verdict, final_verdict = v_all[first_of_reading], v_all[last]
    meas = readings["measured"].to_numpy(float)[positions][last]
    pred = readings["predicted"].to_numpy(float)[positions][last]

    progress(2, total, "keys")
    combined = ((s_code * max(len(st_uni), 1) + st_code) * max(len(l_uni), 1) + l_code) * max(len(q_uni), 1) + q_code
    key, _ = pd.factorize(combined)
    key = key.astype(np.int64)
    korder = np.lexsort((first_seq, key))
    ksorted = key[korder]
    kb = np.r_[True, ksorted[1:] != ksorted[:-1]] if key.size else np.zeros(0, bool)
    first_row, last_row = korder[kb], korder[np.r_[kb[1:], True]] if key.size else korder
    n_keys = int(kb.sum())
    readings_per_key = np.bincount(key, minlength=n_keys)
    revisions_per_key = np.bincount(key, weights=n_revisions.astype(float), minlength=n_keys)
    pass_lut = np.isin(v_uni, np.asarray(list(pass_verdicts), dtype=object))
    checked_lut = v_uni != "unchecked"
    first_v, final_v = first_verdict[first_row], final_verdict[last_row]
    kk = key[first_row]
    info = chosen.set_index("session_id")
    key_session = s_code[first_row]
    keys = pd.DataFrame({
        "session_id": pd.Categorical.from_codes(key_session, categories=pd.Index(s_uni)),
        "step_id": pd.Categorical.from_codes(st_code[first_row], categories=pd.Index(st_uni)),
        "location": pd.Categorical.from_codes(l_code[first_row], categories=pd.Index(l_uni)),
        "quantity": pd.Categorical.from_codes(q_code[first_row], categories=pd.Index(q_uni)),
        "first_checked": checked_lut[first_v],
        "first_pass": pass_lut[first_v],
        "final_checked": checked_lut[final_v],
        "final_pass": pass_lut[final_v],
        "readings": readings_per_key[kk],
        "retries": ((readings_per_key[kk] - 1) + revisions_per_key[kk]).astype(np.int64),
        "template_id": info["template_id"].reindex(s_uni).to_numpy(object)[key_session],
        "section": info["section"].reindex(s_uni).to_numpy(object)[key_session],
    })

    progress(3, total, "pass rates")

    def rates(frame: pd.DataFrame, by: list[str]) -> pd.DataFrame:
        f = frame.assign(fp=frame["first_pass"] & frame["first_checked"], lp=frame["final_pass"]
                         & frame["final_checked"], retried=frame["retries"] > 0)
        g = f.groupby(by, observed=True, sort=True)
        out = g.agg(keys=("fp", "size"), first_checked=("first_checked", "sum"), first_pass=("fp", "sum"),
                    final_checked=("final_checked", "sum"), final_pass=("lp", "sum"),
                    retries=("retries", "sum"), keys_retried=("retried", "sum"))
        with np.errstate(invalid="ignore", divide="ignore"):
            out["first_pass_rate"] = out["first_pass"] / out["first_checked"].replace(0, np.nan)
            out["final_pass_rate"] = out["final_pass"] / out["final_checked"].replace(0, np.nan)
        out = out.reset_index()
        for col in by:
            if isinstance(out[col].dtype, pd.CategoricalDtype):
                out[col] = out[col].astype(object)
        return out

    steps = rates(keys, ["template_id", "step_id", "quantity"])
    per_session = rates(keys, ["session_id"])
    per_session = per_session.merge(chosen[["session_id", "section", "group", "cart", "template_id",
                                            "template_version", "created_at"]], on="session_id", how="left")
    per_session["modified_z"] = np.nan
    for _section, idx in per_session.groupby("section", observed=True).groups.items():
        per_session.loc[idx, "modified_z"] = modified_z(per_session.loc[idx, "final_pass_rate"].to_numpy(float))
    per_session["stands_out"] = per_session["modified_z"] < MODIFIED_Z_LIMIT

    # template versions: the usual (most frequent) version and hash per template id
    tv = chosen.groupby(["template_id", "template_version", "template_sha256"], observed=True).size()
    tv = tv.reset_index(name="sessions").sort_values(["template_id", "sessions"], ascending=[True, False])
    usual = tv.drop_duplicates("template_id").set_index("template_id")
    odd = chosen[(chosen["template_version"].to_numpy(object)
                  != usual["template_version"].reindex(chosen["template_id"]).to_numpy(object))
                 | (chosen["template_sha256"].to_numpy(object)
                    != usual["template_sha256"].reindex(chosen["template_id"]).to_numpy(object))]
    versions = odd[["session_id", "section", "group", "template_id", "template_version", "template_sha256"]].assign(
        usual_version=usual["template_version"].reindex(odd["template_id"]).to_numpy(object))
    per_session["template_differs"] = per_session["session_id"].isin(set(odd["session_id"]))

    # sections and dates
    # days as integers (days since 1970-01-01 UTC): vectorized, no per-row timestamps
    session_day = pd.Series(_days(chosen["created_at"]), index=chosen["session_id"].to_numpy(object))
    row_day = session_day.reindex(s_uni).fillna(0).to_numpy(np.int64)[s_code]
    keys["day"] = row_day[first_row]
    sections = rates(keys, ["section"])
    sections = sections.merge(per_session.groupby("section", observed=True).size().rename("sessions"),
                              left_on="section", right_index=True)
    section_dates = rates(keys, ["section", "day"])
    section_dates.insert(1, "date", _dates(section_dates.pop("day").to_numpy(np.int64)))

    progress(4, total, "errors")
    q_is_angle = np.array([is_angle_quantity(str(q)) for q in q_uni], dtype=bool)
    angle_row = q_is_angle[q_code]
    err = np.where(angle_row, meas - pred, relative_error(meas, pred))
    err_rows = []
    by_q = np.argsort(q_code, kind="stable")
    splits = np.flatnonzero(np.diff(q_code[by_q])) + 1
    for chunk in np.split(by_q, splits) if by_q.size else []:
        name = str(q_uni[q_code[chunk[0]]])
        values = err[chunk]
        values = values[np.isfinite(values)]
        result.errors[name] = values
        angle = is_angle_quantity(name)
        lo, med, hi = (np.percentile(values, [5, 50, 95]) if values.size else (np.nan,) * 3)
        err_rows.append({"quantity": name, "error_kind": f"difference ({unit_of(name)})" if angle else "relative",
                         "count": int(values.size), "median": med, "p05": lo, "p95": hi})
    errors = pd.DataFrame(err_rows, columns=["quantity", "error_kind", "count", "median", "p05", "p95"])

    with_code = np.flatnonzero(d_uni[d_all[last]] != "")
    diag = pd.DataFrame({"diagnosis_code": d_uni[d_all[last][with_code]], "session": s_code[with_code],
                         "position": positions[last[with_code]]})
    diagnoses = (diag.groupby("diagnosis_code", sort=True)
                 .agg(count=("session", "size"), sessions=("session", "nunique"), first=("position", "min"))
                 .reset_index().sort_values(["count", "diagnosis_code"], ascending=[False, True]).head(15))
    diagnoses["example"] = readings["diagnosis"].iloc[diagnoses["first"].to_numpy(np.int64)].fillna("").to_numpy(
        object)
    diagnoses = diagnoses.drop(columns="first")

    progress(5, total, "carts over time")
    per_reading = pd.DataFrame({
        "cart": pd.Categorical.from_codes(c_all[last], categories=pd.Index(c_uni)),
        "quantity": pd.Categorical.from_codes(q_code, categories=pd.Index(q_uni)),
        "location": pd.Categorical.from_codes(l_code, categories=pd.Index(l_uni)),
        "error": err, "day": row_day})
    carts = _cart_trends(per_reading[~angle_row], drift_threshold, offset_threshold)
    result.tables = {"sessions": per_session, "steps": steps, "errors": errors,
                     "diagnoses": diagnoses.reset_index(drop=True), "sections": sections,
                     "section_dates": section_dates, "carts": carts,
                     "template_versions": versions.reset_index(drop=True)}
    progress(total, total, "done")
    return result


def _days(created: pd.Series) -> np.ndarray:
    """Whole days since 1970-01-01 UTC of timestamps (tz-aware or naive UTC)."""
    ts = pd.to_datetime(created, utc=True).dt.tz_localize(None)
    return ts.to_numpy("datetime64[D]").astype(np.int64)


def _dates(days: np.ndarray) -> pd.DatetimeIndex:
    return pd.to_datetime(np.asarray(days, dtype="datetime64[D]")).tz_localize("UTC")


def _cart_trends(latest: pd.DataFrame, drift_threshold: float, offset_threshold: float) -> pd.DataFrame:
    from scipy.stats import theilslopes

    columns = ["cart", "quantity", "location", "dates", "first_date", "last_date", "median_error",
               "recent_median_error", "slope_per_day", "slope_low", "slope_high", "drift_over_span", "drifting",
               "off", "series_days", "series_errors"]
    frame = latest[["cart", "quantity", "location", "error", "day"]]
    frame = frame[np.isfinite(frame["error"].to_numpy(float))]
    if frame.empty:
        return pd.DataFrame(columns=columns)
    daily = frame.groupby(["cart", "quantity", "location", "day"], observed=True, sort=True)["error"].median()
    daily = daily.reset_index()
    group_codes = daily.groupby(["cart", "quantity", "location"], observed=True, sort=True).ngroup().to_numpy()
    bounds = np.flatnonzero(np.diff(group_codes)) + 1
    day_all, err_all = daily["day"].to_numpy(np.int64), daily["error"].to_numpy(float)
    labels = daily[["cart", "quantity", "location"]].to_numpy(object)
    rows = []
    for idx in np.split(np.arange(len(daily)), bounds):
        days = (day_all[idx] - day_all[idx[0]]).astype(float)  # sorted by day within the group
        y = err_all[idx]
        slope = low = high = np.nan
        if len(days) >= 4 and np.ptp(days) > 0:
            slope, _, low, high = theilslopes(y, days, alpha=0.95)
        span = float(np.ptp(days))
        drift = slope * span if np.isfinite(slope) else np.nan
        drifting = bool(np.isfinite(slope) and (low > 0 or high < 0) and abs(drift) > drift_threshold)
        recent = float(np.median(y[-3:]))
        cart, q, loc = labels[idx[0]]
        rows.append({"cart": cart, "quantity": q, "location": loc, "dates": len(days),
                     "first_date": day_all[idx[0]], "last_date": day_all[idx[-1]],
                     "median_error": float(np.median(y)), "recent_median_error": recent, "slope_per_day": slope,
                     "slope_low": low, "slope_high": high, "drift_over_span": drift, "drifting": drifting,
                     "off": abs(recent) > offset_threshold, "series_days": days, "series_errors": y})
    out = pd.DataFrame(rows, columns=columns)
    out["first_date"] = _dates(out["first_date"].to_numpy(np.int64))
    out["last_date"] = _dates(out["last_date"].to_numpy(np.int64))
    return out


# -- rendering ----------------------------------------------------------------------------------------
def _pct(x: float) -> str:
    return "" if not np.isfinite(x) else f"{100 * x:.1f} %"


def review_report(result: ReviewResult, *, title: str = "Review across sessions", max_histograms: int = 12,
                  max_trends: int = 8) -> Report:
    """Render a :class:`ReviewResult` as one self-contained HTML page (and its export tables)."""
    t = result.tables
    body = [f"<h1>{esc(title)}</h1>", f'<p class="muted">{esc(result.filter.describe())}. '
            f"{len(t['sessions'])} sessions. Pass = verdict accept; unchecked readings are not counted.</p>"]
    sessions = t["sessions"]
    body.append("<h2>Sections</h2>")
    body.append(table(["section", "sessions", "keys", "first-attempt pass", "final pass", "retries"],
                      [[r.section, r.sessions, r.keys, _pct(r.first_pass_rate), _pct(r.final_pass_rate), r.retries]
                       for r in t["sections"].itertuples(index=False)],
                      numeric=[False, True, True, False, False, True]))
    sd = t["section_dates"]
    if not sd.empty and sd["date"].nunique() > 1:
        t0 = sd["date"].min()
        series = [Series(str(sec), ((part["date"] - t0) / pd.Timedelta(days=1)).to_numpy(float),
                         100 * part["final_pass_rate"].to_numpy(float), markers=True)
                  for sec, part in sd.groupby("section", observed=True)]
        chart = line_chart(series, xlabel=f"days since {t0:%Y-%m-%d}", ylabel="final pass rate (%)", width=760)
        body.append("<figure>" + chart + "<figcaption>Final pass rate per section and day."
                    "</figcaption></figure>")
    body.append("<h2>Steps and quantities</h2>")
    body.append(table(["template", "step", "quantity", "keys", "first-attempt pass", "final pass", "retries",
                       "keys retried"],
                      [[r.template_id, r.step_id, r.quantity, r.keys, _pct(r.first_pass_rate),
                        _pct(r.final_pass_rate), r.retries, r.keys_retried]
                       for r in t["steps"].itertuples(index=False)],
                      numeric=[False, False, False, True, False, False, True, True]))
    body.append("<h2>Sessions that stand out</h2>")
    out = sessions[sessions["stands_out"] | sessions["template_differs"]]
    body.append(table(["session", "section", "group", "cart", "final pass", "modified z", "flags"],
                      [[r.session_id, r.section, r.group, r.cart, _pct(r.final_pass_rate),
                        f"{r.modified_z:.2f}" if np.isfinite(r.modified_z) else "",
                        ", ".join(w for w, on in (("pass rate far below the section's", r.stands_out),
                                                  ("template version differs", r.template_differs)) if on)]
                       for r in out.itertuples(index=False)])
                if not out.empty else '<p class="muted">none</p>')
    tv = t["template_versions"]
    if not tv.empty:
        body.append("<h3>Template version differs</h3>")
        body.append(table(["session", "section", "group", "template", "version", "usual version", "SHA-256"],
                          tv[["session_id", "section", "group", "template_id", "template_version", "usual_version",
                              "template_sha256"]].itertuples(index=False)))
    body.append("<h2>Most frequent diagnoses</h2>")
    dg = t["diagnoses"]
    body.append(table(["diagnosis", "readings", "sessions", "example"], dg.itertuples(index=False),
                      numeric=[False, True, True, False]) if not dg.empty else '<p class="muted">none</p>')
    body.append("<h2>Error distribution per quantity</h2>")
    body.append(table(["quantity", "error", "count", "median", "5th pct", "95th pct"],
                      [[r.quantity, r.error_kind, r.count, r.median, r.p05, r.p95]
                       for r in t["errors"].itertuples(index=False)],
                      numeric=[False, False, True, True, True, True]))
    hist = sorted(result.errors.items(), key=lambda kv: -kv[1].size)[:max_histograms]
    body.append('<div class="grid2">')
    for name, values in hist:
        angle = is_angle_quantity(name)
        shown = values if angle else 100 * values
        label = f"{name}: measured - predicted ({unit_of(name)})" if angle else f"{name}: relative error (%)"
        body.append(f"<figure>{histogram_svg(_clip(shown), xlabel=label, title=name)}<figcaption>{esc(label)}"
                    "; 0.5 % of the values at each end are left out of the axis.</figcaption></figure>")
    body.append("</div>")
    body.append("<h2>Carts over time</h2>")
    carts = t["carts"]
    flagged = carts[carts["drifting"] | carts["off"]] if not carts.empty else carts
    body.append(table(["cart", "quantity", "location", "dates", "median error", "recent median", "slope per day",
                       "drift over span", "flags"],
                      [[r.cart, r.quantity, r.location, r.dates, _pct(r.median_error), _pct(r.recent_median_error),
                        _pct(r.slope_per_day), _pct(r.drift_over_span),
                        ", ".join(w for w, on in (("drifting", r.drifting), ("off", r.off)) if on)]
                       for r in flagged.itertuples(index=False)],
                      numeric=[False, False, False, True, False, False, False, False, False])
                if not flagged.empty else '<p class="muted">No cart reading drifts or sits off its prediction.</p>')
    if not flagged.empty:
        ranked = flagged.assign(size=flagged["drift_over_span"].abs().fillna(0)).nlargest(max_trends, "size")
        body.append('<div class="grid2">')
        for r in ranked.itertuples(index=False):
            chart = line_chart([Series(f"{r.cart} {r.quantity} {r.location}", r.series_days, 100 * r.series_errors,
                                       markers=True)], xlabel=f"days since {r.first_date:%Y-%m-%d}",
                               ylabel="relative error (%)", hbands=[(0.0, 0.0)])  # the zero line
            body.append(f"<figure>{chart}<figcaption>{esc(r.cart)}: {esc(r.quantity)} at {esc(r.location)}, "
                        "daily median relative error.</figcaption></figure>")
        body.append("</div>")
    body.append(f'<p class="muted">Made with labkit {esc(__version__)}.</p>')
    export = {k: v.drop(columns=[c for c in ("series_days", "series_errors") if c in v.columns])
              for k, v in t.items()}
    data = {"kind": "labkit-review", "labkit_version": __version__, "filter": result.filter.describe(),
            "sessions": len(sessions)}
    return Report(page(title, "".join(body), data=data), export, title)


def _clip(values: np.ndarray) -> np.ndarray:
    if values.size < 20:
        return values
    lo, hi = np.percentile(values, [0.5, 99.5])
    return values[(values >= lo) & (values <= hi)]


def review_from_archive(archive: object, flt: ReviewFilter | None = None, *, progress: Progress = no_progress,
                        **kwargs: object) -> tuple[ReviewResult, Report]:
    """Review the sessions of an archive and render the page."""
    progress(0, 1, "reading the archive")
    result = review(archive.sessions(), archive.readings(), flt, progress=progress, **kwargs)  # type: ignore[attr-defined,arg-type]
    return result, review_report(result)
