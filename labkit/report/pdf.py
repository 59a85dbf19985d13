"""PDF through headless Chromium (``chromium --headless --print-to-pdf``), when it is installed."""

from __future__ import annotations

import os
import shutil
import subprocess
import tempfile
from pathlib import Path

from labkit.report.common import ReportError

CANDIDATES = ("chromium", "chromium-browser", "google-chrome")


def find_chromium() -> str | None:
    """Path of a Chromium executable (``LABKIT_CHROMIUM`` first), or None."""
    given = os.environ.get("LABKIT_CHROMIUM")
    if given:
        return given if Path(given).is_file() else None
    for name in CANDIDATES:
        found = shutil.which(name)
        if found:
            return found
    return None


def html_to_pdf(html_path: str | Path, pdf_path: str | Path, *, timeout_s: float = 120.0) -> Path:
    """Print an HTML file to PDF with headless Chromium (print CSS applies; no header or footer).

    Raises
    ------
    ReportError
        No Chromium found, or it failed or produced no file.
    """
    exe = find_chromium()
    if exe is None:
        msg = "no Chromium found for --pdf (install the 'chromium' package, or set LABKIT_CHROMIUM)"
        raise ReportError(msg)
    src, out = Path(html_path).resolve(), Path(pdf_path).resolve()
    with tempfile.TemporaryDirectory(prefix="labkit-pdf-") as profile:
        cmd = [exe, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run", "--disable-extensions",
               "--disable-background-networking", "--disable-component-update", "--disable-sync",
               f"--user-data-dir={profile}", "--no-pdf-header-footer", f"--print-to-pdf={out}", src.as_uri()]
        try:
            done = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout_s, check=False)
        except (OSError, subprocess.TimeoutExpired) as exc:
            msg = f"Chromium could not print {src} to PDF: {exc}"
            raise ReportError(msg) from exc
    if done.returncode != 0 or not out.is_file() or out.stat().st_size == 0:
        msg = f"Chromium could not print {src} to PDF (exit {done.returncode}): {done.stderr.strip()[-400:]}"
        raise ReportError(msg)
    return out
