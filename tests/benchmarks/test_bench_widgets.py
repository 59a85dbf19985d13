"""Front-end timings in headless Chromium (prints figures; no timed assertion).

* entry to verdict: from the Enter key-down in a reading's field to the verdict word being in the page
  (timed inside the page with ``performance.now()``; median over 20 entries; target <= 150 ms);
* starter to first widget: from opening the starter notebook to the first interactive widget (Run All
  included, kernel start included).
"""

from __future__ import annotations

import statistics
import time

import pytest

from tests.browser.lab_support import ARTIFACTS, chromium, labkit_lab, open_starter, require_browser, shutdown_sessions

ARM = """([inputSel, verdictSel, word]) => {
  window.__lkTime = undefined;
  const box = document.querySelector(verdictSel);
  const input = document.querySelector(inputSel);
  let t0 = null;
  input.addEventListener('keydown', (e) => { if (e.key === 'Enter') { t0 = performance.now(); } }, {once: true});
  const obs = new MutationObserver(() => {
    if (t0 !== null && box.textContent.includes(word)) { window.__lkTime = performance.now() - t0; obs.disconnect(); }
  });
  obs.observe(box, {subtree: true, childList: true, characterData: true});
}"""


@pytest.mark.benchmark
def test_bench_entry_to_verdict_and_starter_to_widget(tmp_path):
    require_browser()
    from playwright.sync_api import expect

    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    with labkit_lab(tmp_path / "labkit-work", ARTIFACTS / "bench-lab.log") as srv, chromium() as page:
        t_open = open_starter(page, srv, "bench-widgets")
        page.locator(".lk-roster").click()
        expect(page.get_by_text("6 people (5 students)")).to_be_visible(timeout=20_000)
        page.locator(".lk-start").click()
        expect(page.locator(".lk-runner .lk-strip")).to_contain_text("OPEN", timeout=30_000)
        entry, verdict = ".lk-entry-0 input", ".lk-verdict-0"
        times = []
        for k in range(20):
            value, word = ("120.0 V", "ACCEPT") if k % 2 == 0 else ("90 V", "OUTSIDE")
            if k > 0:  # a recorded reading changes only as a correction, with its reason
                reason = page.locator(".lk-reason input")
                reason.fill(f"benchmark entry {k}")
                reason.press("Tab")
            page.locator(entry).fill(value)
            page.evaluate(ARM, [entry, verdict, word])
            page.locator(entry).press("Enter")
            try:
                page.wait_for_function("window.__lkTime !== undefined", timeout=10_000)
            except Exception:
                page.screenshot(path=str(ARTIFACTS / "bench-failure.png"))
                print("failed at", k, page.locator(verdict).inner_text())
                raise
            times.append(page.evaluate("window.__lkTime"))
            expect(page.locator(verdict)).not_to_contain_text("recording", timeout=10_000)
        shutdown_sessions(srv)
    median = statistics.median(times)
    print(f"\nBENCH widgets entry_to_verdict_ms median={median:.1f} min={min(times):.1f} max={max(times):.1f} "
          f"n={len(times)} (target <= 150)")
    print(f"BENCH widgets starter_open_to_first_widget_s={t_open:.2f} server_start_s={srv['start_s']:.2f}")
    (ARTIFACTS / "bench-widgets.txt").write_text(f"entry_to_verdict_ms={times}\nstarter_to_widget_s={t_open:.2f}\n"
                                                 f"at {time.strftime('%Y-%m-%d %H:%M:%S')}\n")
