"""Helpers for the browser tests: run ``labkit lab`` itself headlessly, drive Debian's Chromium with Playwright.

Learned from ../shared/browser-testing (the recipe): per-run Jupyter config/data/runtime folders with the
announcements toast disabled, a kernel-idle wait on the status bar, a per-test workspace URL, Run All by
its menu label, ``executable_path`` + ``launch_persistent_context``, and processes stopped by their own
process group. Written for labkit; nothing here is copied from the recipe's files.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import signal
import subprocess
import sys
import tempfile
import time
import urllib.request
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from urllib.parse import urlparse

import pytest

CHROMIUM = os.environ.get("LABKIT_CHROMIUM", "/usr/bin/chromium")
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync"]
ARTIFACTS = Path(__file__).resolve().parent.parent / "artifacts"
REPO = Path(__file__).resolve().parent.parent.parent
BAD_TEXT = ("Error displaying widget", "model not found", "Failed to load model class")


def require_browser() -> None:
    """Skip when Chromium or Playwright is missing, except under CI (then fail: they must run)."""
    missing = []
    if not Path(CHROMIUM).is_file():
        missing.append(f"chromium at {CHROMIUM} (apt-get install -y chromium chromium-driver)")
    try:
        import playwright.sync_api  # noqa: F401
    except ImportError:
        missing.append("playwright (pip install playwright; never `playwright install`)")
    for module in ("jupyterlab", "ipywidgets", "bqplot"):
        try:
            __import__(module)
        except ImportError:
            missing.append(f"{module} (pip install 'labkit[lab]')")
    if missing:
        if os.environ.get("CI"):
            pytest.fail("browser test prerequisites missing under CI: " + "; ".join(missing))
        pytest.skip("browser test prerequisites missing: " + "; ".join(missing))


def _lab_command() -> list[str]:
    probe = subprocess.run([sys.executable, "-m", "labkit", "lab", "--help"], capture_output=True, cwd=REPO)
    return [sys.executable, "-m", "labkit", "lab"] if probe.returncode == 0 else [sys.executable, "-m",
                                                                                 "labkit.cli.lab"]


@contextmanager
def labkit_lab(folder: Path, log_path: Path) -> Iterator[dict]:
    """Run ``labkit lab --no-browser --folder FOLDER`` and yield its url, token, port and base."""
    base = Path(tempfile.mkdtemp(prefix="labkit-e2e-"))
    env = dict(os.environ)
    for key, sub in (("JUPYTER_CONFIG_DIR", "config"), ("JUPYTER_DATA_DIR", "data"),
                     ("JUPYTER_RUNTIME_DIR", "runtime"), ("IPYTHONDIR", "ipython")):
        (base / sub).mkdir(parents=True, exist_ok=True)
        env[key] = str(base / sub)
    env["JUPYTER_PLATFORM_DIRS"] = "1"
    env["PATH"] = f"{Path(sys.executable).parent}{os.pathsep}{env.get('PATH', '')}"
    (base / "config" / "labconfig").mkdir(parents=True)
    (base / "config" / "labconfig" / "page_config.json").write_text(json.dumps(
        {"disabledExtensions": {"@jupyterlab/apputils-extension:announcements": True}}))
    cmd = [*_lab_command(), "--no-browser", "--folder", str(folder)]
    if hasattr(os, "geteuid") and os.geteuid() == 0:
        cmd.append("--allow-root")
    log = open(log_path, "w")  # noqa: SIM115
    t0 = time.monotonic()
    proc = subprocess.Popen(cmd, env=env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
    try:
        token = ""
        deadline = time.monotonic() + 90
        while time.monotonic() < deadline:
            if proc.poll() is not None:
                raise RuntimeError(f"labkit lab exited with {proc.returncode}: {log_path.read_text()}")
            m = re.search(r"open: http://127\.0\.0\.1:(\d+)/\S*\?token=(\S+)", log_path.read_text())
            if m and not token:
                port, token = int(m.group(1)), m.group(2)
            if token:
                try:
                    with urllib.request.urlopen(f"http://127.0.0.1:{port}/api/status?token={token}",
                                                timeout=2) as r:
                        if r.status == 200:
                            break
                except OSError:
                    pass
            time.sleep(0.1)
        else:
            raise TimeoutError(log_path.read_text())
        yield {"base": f"http://127.0.0.1:{port}", "token": token, "port": port, "start_s": time.monotonic() - t0,
               "folder": folder}
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGTERM)
            try:
                proc.wait(timeout=15)
            except subprocess.TimeoutExpired:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait(timeout=5)
        log.close()
        shutil.rmtree(base, ignore_errors=True)


@contextmanager
def chromium(viewport: tuple[int, int] = (1400, 1000)) -> Iterator:
    """A fresh Chromium profile with every non-loopback request blocked and recorded (``page.blocked``)."""
    from playwright.sync_api import sync_playwright

    profile = tempfile.mkdtemp(prefix="labkit-chromium-")
    with sync_playwright() as pw:
        ctx = pw.chromium.launch_persistent_context(user_data_dir=profile, executable_path=CHROMIUM, headless=True,
                                                    args=CHROMIUM_ARGS,
                                                    viewport={"width": viewport[0], "height": viewport[1]})
        blocked: list[str] = []

        def guard(route: object) -> None:
            url = route.request.url  # type: ignore[attr-defined]
            host = urlparse(url).hostname or ""
            if url.startswith(("data:", "blob:", "about:")) or host in ("127.0.0.1", "localhost"):
                route.continue_()  # type: ignore[attr-defined]
            else:
                blocked.append(url)
                route.abort()  # type: ignore[attr-defined]

        ctx.route("**/*", guard)
        try:
            page = ctx.pages[0] if ctx.pages else ctx.new_page()
            page.blocked = blocked
            page.console_log = []
            page.on("console", lambda m: page.console_log.append(f"[{m.type}] {m.text}"))
            page.on("pageerror", lambda e: page.console_log.append(f"[pageerror] {e}"))
            page.on("dialog", lambda d: (page.console_log.append(f"[dialog] {d.message}"), d.dismiss()))
            yield page
        finally:
            ctx.close()
            shutil.rmtree(profile, ignore_errors=True)


def wait_kernel_idle(page: object, timeout_ms: int = 90_000) -> None:
    """Wait until the status bar says the kernel is connected and idle (not the toolbar's early 'idle')."""
    from playwright.sync_api import expect

    expect(page.get_by_role("button", name=re.compile(r"\(ipykernel\) \| Idle$"))).to_be_visible(  # type: ignore[attr-defined]
        timeout=timeout_ms)


def menu(page: object, top: str, item: str) -> None:
    """Open a menu-bar menu and click an item, both by their visible labels."""
    page.locator(f".lm-MenuBar-itemLabel:text-is('{top}')").click()  # type: ignore[attr-defined]
    page.locator(".lm-Menu-itemLabel", has_text=item).first.click()  # type: ignore[attr-defined]


def open_starter(page: object, srv: dict, workspace: str) -> float:
    """Open the starter notebook in its own workspace, run all cells, wait for the app; return seconds taken."""
    from playwright.sync_api import expect

    t0 = time.monotonic()
    page.goto(f"{srv['base']}/lab/workspaces/{workspace}/tree/starter.ipynb?token={srv['token']}")  # type: ignore[attr-defined]
    wait_kernel_idle(page)
    menu(page, "Run", "Run All Cells")
    expect(page.locator(".lk-app")).to_be_visible(timeout=90_000)  # type: ignore[attr-defined]
    expect(page.locator(".lk-load")).to_be_enabled(timeout=30_000)  # type: ignore[attr-defined]
    return time.monotonic() - t0


def shutdown_sessions(srv: dict) -> None:
    """Stop the kernels the browser left running (closing the browser does not)."""
    q = f"?token={srv['token']}"
    with urllib.request.urlopen(f"{srv['base']}/api/sessions{q}") as r:
        sessions = json.load(r)
    for s in sessions:
        req = urllib.request.Request(f"{srv['base']}/api/sessions/{s['id']}{q}", method="DELETE")
        urllib.request.urlopen(req).close()
