"""End to end in headless Chromium: ``labkit lab`` serves the starter notebook; a full demo session is walked.

Readings right and wrong (verdicts and a diagnosis seen), a simulated capture taken and recorded, script
injection typed into text fields (nothing runs), a kernel restart (the session resumes with its readings),
a report exported. Every non-loopback request is blocked and must not have been needed; no widget may
fail to render. Screenshots go to tests/artifacts/.
"""

from __future__ import annotations

import pytest

from tests.browser.lab_support import (
    ARTIFACTS,
    BAD_TEXT,
    chromium,
    labkit_lab,
    menu,
    open_starter,
    require_browser,
    shutdown_sessions,
    wait_kernel_idle,
)

PAYLOAD = '<img src=x onerror="window.__pwned=1">'
SCRIPT = "<script>window.__pwned=2</script>"


@pytest.fixture(scope="module")
def lab(tmp_path_factory):
    require_browser()
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    folder = tmp_path_factory.mktemp("e2e") / "labkit-work"
    with labkit_lab(folder, ARTIFACTS / "e2e-lab.log") as srv:
        yield srv


def _enter(page, selector: str, text: str) -> None:
    box = page.locator(f"{selector} input")
    box.fill(text)
    box.press("Enter")


@pytest.mark.slow
def test_full_demo_session_in_the_browser(lab):
    from playwright.sync_api import expect

    with chromium() as page:
        open_starter(page, lab, "e2e-session")
        page.screenshot(path=str(ARTIFACTS / "e2e-1-plan.png"))
        # Plan: the demo roster, then hostile text in the people and section fields
        page.locator(".lk-roster").click()
        expect(page.get_by_text("6 people (5 students)")).to_be_visible(timeout=20_000)
        people = page.locator(".lk-people input")
        people.fill(f"p-101, p-102, {PAYLOAD}")
        people.press("Tab")
        section = page.locator(".lk-section input")
        section.fill(f"S01 {SCRIPT}")
        section.press("Tab")
        page.locator(".lk-preview").click()
        expect(page.get_by_text("Step 6:").first).to_be_visible(timeout=30_000)
        page.locator(".lk-start").click()
        expect(page.locator(".lk-runner .lk-strip")).to_contain_text("OPEN", timeout=30_000)
        expect(page.locator(".lk-runner .lk-strip")).to_contain_text(SCRIPT)  # shown as text
        # step 1: one right reading, one wrong
        _enter(page, ".lk-entry-0", "120.0 V")
        expect(page.locator(".lk-verdict-0")).to_contain_text("\u2713 ACCEPT", timeout=10_000)
        _enter(page, ".lk-entry-1", "50 Hz")
        expect(page.locator(".lk-verdict-1")).to_contain_text("\u2717 OUTSIDE", timeout=10_000)
        expect(page.locator(".lk-caution").first).to_contain_text("does not isolate from the mains")
        expect(page.locator(".lk-diagram svg")).to_be_visible()
        page.screenshot(path=str(ARTIFACTS / "e2e-2-step1.png"))
        # on to the resistive load: a current read with the wrong probe setting, then a capture
        for _ in range(2):
            page.locator(".lk-next").click()
            page.wait_for_timeout(300)
        expect(page.locator(".lk-runner")).to_contain_text("Step 3:", timeout=20_000)
        _enter(page, ".lk-entry-1", "0.054 A")
        expect(page.locator(".lk-verdict-1")).to_contain_text("OUTSIDE", timeout=10_000)
        expect(page.locator(".lk-diagnosis-1")).to_contain_text("Likely cause", timeout=20_000)
        page.locator(".lk-take").click()
        expect(page.get_by_text("capture ready")).to_be_visible(timeout=30_000)
        expect(page.locator(".lk-wave path.line").first).to_be_attached(timeout=20_000)
        page.locator(".lk-use-capture").click()
        expect(page.locator(".lk-verdict-0")).to_contain_text("ACCEPT", timeout=20_000)
        page.locator(".lk-capture").scroll_into_view_if_needed()
        page.screenshot(path=str(ARTIFACTS / "e2e-3-capture.png"), full_page=True)
        # kernel restart: run the starter again, the session comes back with its readings
        menu(page, "Kernel", "Restart Kernel and Run All")
        page.locator(".jp-Dialog .jp-mod-accept").click()
        expect(page.get_by_text("resumed session").first).to_be_visible(timeout=90_000)
        wait_kernel_idle(page)
        expect(page.locator(".lk-runner")).to_contain_text("Step 3:", timeout=30_000)
        expect(page.locator(".lk-verdict-0")).to_contain_text("ACCEPT", timeout=20_000)
        expect(page.locator(".lk-verdict-1")).to_contain_text("OUTSIDE")
        expect(page.locator(".lk-runner .lk-steps")).to_contain_text("2 recorded")
        page.screenshot(path=str(ARTIFACTS / "e2e-4-resumed.png"))
        page.locator(".lk-report").click()
        expect(page.get_by_text("report written to")).to_be_visible(timeout=60_000)
        page.screenshot(path=str(ARTIFACTS / "e2e-5-report.png"), full_page=True)
        # nothing typed ran, nothing failed to render, nothing left the machine
        assert page.evaluate("window.__pwned === undefined")
        assert page.locator("img[src='x']").count() == 0
        body = page.locator("body").inner_text()
        for bad in BAD_TEXT:
            assert bad not in body, f"page shows {bad!r}"
        assert page.blocked == [], page.blocked
        (ARTIFACTS / "e2e-console.log").write_text("\n".join(page.console_log))
    shutdown_sessions(lab)
