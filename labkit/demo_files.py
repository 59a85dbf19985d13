"""Where the embedded demo files are: the demo bench, its cart and the demo templates.

In a source checkout (and an editable install) they are read from ``session_templates/``;
a wheel installs the same files as data under ``<prefix>/share/labkit/session_templates``.
"""

from __future__ import annotations

import sys
import sysconfig
from pathlib import Path

DEMO_BENCH = "demo-bench.toml"
DEMO_CART = "demo-cart-03.toml"
DEMO_TEMPLATES = ("lab1-line-and-loads.toml", "lab2-synchronize.toml", "lab3-harmonics.toml")


def demo_folder() -> Path:
    """The folder holding the demo bench, cart and templates."""
    checkout = Path(__file__).resolve().parent.parent / "session_templates"
    candidates = [checkout, Path(sysconfig.get_path("data")) / "share" / "labkit" / "session_templates",
                  Path(sys.prefix) / "share" / "labkit" / "session_templates"]
    for folder in candidates:
        if (folder / DEMO_BENCH).is_file():
            return folder
    from labkit.core.errors import LabkitError

    msg = "the demo files were not found; looked in: " + ", ".join(str(c) for c in candidates)
    raise LabkitError(msg)


def demo_path(name: str) -> Path:
    """Full path of a demo file; a template may be named without ``.toml``."""
    folder = demo_folder()
    candidate = folder / name
    if not candidate.suffix:
        candidate = candidate.with_suffix(".toml")
    return candidate
