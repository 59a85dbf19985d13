"""Script-injection payloads in every user and template text field, opened in headless Chromium (DEMO DATA).

The pages are loaded from file:// with Playwright for Python driving Debian's Chromium. Nothing may run:
the payloads try to set ``window.__pwned`` and ``document.title``; the DOM must hold no event-handler
attribute, no script other than the JSON data block, no img/iframe/object. A control page with a raw
inline script inserted (a sanitizer failure simulated) checks that the page's Content-Security-Policy
itself blocks scripts: the script must not run and a ``securitypolicyviolation`` must be reported
(CSP Level 3, W3C: inline script blocked when ``script-src`` falls back to ``default-src 'none'``).

Skips cleanly when Playwright or Chromium is missing, except when the environment variable CI is set.
"""

from __future__ import annotations

import json
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path

import pandas as pd
import pytest

from labkit.report.prelab import prelab_sheet
from labkit.report.review import review, review_report
from labkit.report.session import session_report
from tests.test_report_data import T0, plan, readings_for, session_row, sessions_frame

PAYLOADS = [
    "<script>document.title='pwned';window.__pwned=1</script>",
    "<img src=x onerror=\"window.__pwned=1;document.title='pwned'\">",
    "<svg onload=\"window.__pwned=1\"></svg>",
    "[click me](javascript:window.__pwned=1)",
    "</style><script>window.__pwned=1</script>",
    "\" onmouseover=\"window.__pwned=1\" autofocus onfocus=\"window.__pwned=1\" x=\"",
    "</script><script>window.__pwned=1</script>",
    "<a href=\"javascript:window.__pwned=1\">link</a>",
]
HOSTILE = " ".join(PAYLOADS)
ARGS = ["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run", "--disable-background-networking",
        "--disable-component-update", "--disable-sync"]
INIT = """
window.__cspViolations = 0;
document.addEventListener('securitypolicyviolation', () => { window.__cspViolations += 1; });
"""


def _toml(text: str) -> str:
    return json.dumps(text)  # a JSON string is a valid TOML basic string


@pytest.fixture(scope="module")
def browser() -> Iterator[object]:
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        if os.environ.get("CI"):
            pytest.fail("CI is set but Playwright for Python is not installed")
        pytest.skip("Playwright for Python not installed")
    from labkit.report.pdf import find_chromium

    exe = "/usr/bin/chromium" if Path("/usr/bin/chromium").is_file() else find_chromium()
    if exe is None:
        if os.environ.get("CI"):
            pytest.fail("CI is set but no Chromium is installed (apt-get install -y chromium)")
        pytest.skip("no Chromium installed")
    with sync_playwright() as pw:
        b = pw.chromium.launch(executable_path=exe, headless=True, args=ARGS)
        yield b
        b.close()


def hostile_template_text() -> str:
    text = plan()[3]
    text = text.replace('title = "Lab 2: synchronizing an alternator set to the running grid"',
                        f"title = {_toml('Lab 2 ' + HOSTILE)}")
    text = text.replace('cautions = ["Only the supervisor gives permission to close a synchronizing switch."]',
                        f"cautions = [{_toml(HOSTILE)}]")
    text = text.replace('scenario = "Invented demo lab."', f"scenario = {_toml('Invented demo lab. ' + HOSTILE)}")
    text = text.replace('title = "Start the reference source"',
                        f"title = {_toml('Start ' + HOSTILE)}\ninstructions = {_toml(HOSTILE)}\n"
                        f"cautions = [{_toml(HOSTILE)}]")
    assert text.count("__pwned") > 20
    return text


def hostile_pages(folder: Path) -> list[Path]:
    ttext = hostile_template_text()
    s = session_row("hostile", section="S<script>window.__pwned=1</script>", group=PAYLOADS[5],
                    cart=PAYLOADS[1], people=PAYLOADS, template_text=ttext)
    rows = readings_for(s, note=HOSTILE, recorded_by=PAYLOADS[0], corrections=True)
    rows["entered"] = PAYLOADS[2]
    rows["reason"] = rows["reason"].where(rows["revision"] == 0, HOSTILE)
    rows["diagnosis"] = PAYLOADS[6]
    rows["diagnosis_code"] = PAYLOADS[4]
    events = pd.DataFrame([{"session_id": "hostile", "seq": 999, "at": T0, "by": PAYLOADS[3], "role": "ta",
                            "event": "note", "step_id": "start-ref", "detail": json.dumps({"text": HOSTILE})}])
    roster = pd.DataFrame([{"participant_id": PAYLOADS[0], "name": HOSTILE, "section": "S", "group": "G",
                            "role": "student"}])
    pages = [session_report(s, rows, events, roster=roster).write(folder / "session.html")]
    other = session_row("hostile-2", section=s["section"], group=PAYLOADS[7], cart=PAYLOADS[1],
                        template_text=ttext, template_version=PAYLOADS[0], created_at=T0 + pd.Timedelta(days=1))
    rows2 = readings_for(other, note=HOSTILE, error=0.2)
    res = review(sessions_frame([s, other]), pd.concat([rows, rows2], ignore_index=True))
    pages.append(review_report(res, title=HOSTILE).write(folder / "review.html"))
    from labkit.files.loader import SourceText, parse_toml, template_from_data

    bench = plan()[0]
    src = SourceText("hostile.toml", ttext)
    data, pos = parse_toml(src)
    template = template_from_data(src, data, pos, bench).template
    pages.append(prelab_sheet(bench, template, n_samples=50).write(folder / "prelab.html"))
    return pages


def _open(browser: object, path: Path) -> tuple[object, object, list[str]]:
    context = browser.new_context()  # type: ignore[attr-defined]
    page = context.new_page()
    page.add_init_script(INIT)
    console: list[str] = []
    page.on("console", lambda m: console.append(f"{m.type}: {m.text}"))
    page.on("pageerror", lambda e: console.append(f"pageerror: {e}"))
    page.goto(path.resolve().as_uri())
    page.wait_for_load_state("load")
    return context, page, console


@pytest.fixture(scope="module")
def pages() -> Iterator[list[Path]]:
    with tempfile.TemporaryDirectory() as tmp:
        yield hostile_pages(Path(tmp))


@pytest.mark.parametrize("which", [0, 1, 2], ids=["session", "review", "prelab"])
def test_no_payload_executes(browser: object, pages: list[Path], which: int) -> None:
    context, page, console = _open(browser, pages[which])
    try:
        # move over and focus everything, so handlers that slipped through would fire
        page.mouse.move(200, 200)
        page.keyboard.press("Tab")
        for y in range(0, 3000, 300):
            page.mouse.move(300, y % 900)
        assert page.evaluate("typeof window.__pwned") == "undefined"
        assert page.evaluate("document.title") != "pwned"
        handlers = page.evaluate("""() => Array.from(document.querySelectorAll('*')).flatMap(el =>
            Array.from(el.attributes).filter(a => a.name.toLowerCase().startsWith('on')).map(a => el.tagName))""")
        assert handlers == []
        scripts = page.evaluate("() => Array.from(document.scripts).map(s => s.type)")
        assert scripts == ["application/json"]
        assert page.evaluate("document.querySelectorAll('img, iframe, object, embed, link').length") == 0
        js_links = page.evaluate("""() => Array.from(document.querySelectorAll('[href]'))
            .map(a => a.getAttribute('href')).filter(h => !/^(https?:|mailto:)/i.test(h))""")
        assert js_links == []
        # nothing was even attempted: no policy violation, no error
        assert page.evaluate("window.__cspViolations") == 0
        assert [m for m in console if m.startswith(("error", "pageerror"))] == []
        assert "__pwned" in page.content()  # the payloads are on the page, as text
        data = json.loads(page.evaluate("document.getElementById('labkit-data').textContent"))
        assert data["kind"].startswith("labkit-")
    finally:
        context.close()


def test_policy_blocks_an_inline_script_that_got_in(browser: object, pages: list[Path], tmp_path: Path) -> None:
    html_text = pages[0].read_text(encoding="utf-8")
    broken = html_text.replace("<body>", "<body><script>window.__pwned = 1; document.title = 'pwned';</script>", 1)
    control = tmp_path / "control.html"
    control.write_text(broken, encoding="utf-8")
    context, page, console = _open(browser, control)
    try:
        assert page.evaluate("typeof window.__pwned") == "undefined"
        assert page.evaluate("document.title") != "pwned"
        assert page.evaluate("window.__cspViolations") >= 1
        assert any("Content Security Policy" in m for m in console)
    finally:
        context.close()
    # and without the policy the same script would run: the check above can fail
    unguarded = tmp_path / "unguarded.html"
    unguarded.write_text(broken.replace('http-equiv="Content-Security-Policy"', 'name="x-no-policy"'),
                         encoding="utf-8")
    context, page, _ = _open(browser, unguarded)
    try:
        assert page.evaluate("window.__pwned") == 1
    finally:
        context.close()
