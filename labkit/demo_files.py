"""Where the embedded demo files are: the demo bench, its cart and the demo templates.

In a source checkout they are read from ``session_templates/``; in an installed
package from ``labkit/data/`` (a copy made at build time is not needed: the
package ships them as package data).
"""

from __future__ import annotations

from importlib import resources
from pathlib import Path

DEMO_BENCH = "demo-bench.toml"
DEMO_CART = "demo-cart-03.toml"
DEMO_TEMPLATES = ("lab1-line-and-loads.toml", "lab2-synchronize.toml", "lab3-harmonics.toml")


def demo_folder() -> Path:
    """The folder holding the demo bench, cart and templates."""
    checkout = Path(__file__).resolve().parent.parent / "session_templates"
    if (checkout / DEMO_BENCH).is_file():
        return checkout
    return Path(str(resources.files("labkit") / "data"))


def demo_path(name: str) -> Path:
    """Full path of a demo file; a template may be named without ``.toml``."""
    folder = demo_folder()
    candidate = folder / name
    if not candidate.suffix:
        candidate = candidate.with_suffix(".toml")
    return candidate
