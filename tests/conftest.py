"""Shared fixtures: where the shipped demo files and the broken-file set are, and a loader for either kind."""

from __future__ import annotations

from pathlib import Path

import pytest

from labkit.core.bench import Bench
from labkit.files.loader import load_bench

TESTS = Path(__file__).resolve().parent
DEMO = TESTS.parent / "session_templates"
BROKEN = TESTS / "broken"
MINI = BROKEN / "valid"
"""Valid small bench, cart and template; every file in tests/broken/ is one of them with a defect."""


@pytest.fixture(scope="session")
def demo_folder() -> Path:
    """The folder of the shipped demo bench, cart and templates."""
    return DEMO


@pytest.fixture(scope="session")
def demo_bench() -> Bench:
    """The shipped demo bench type, without a cart."""
    return load_bench(DEMO / "demo-bench.toml").bench


@pytest.fixture(scope="session")
def mini_bench() -> Bench:
    """The small valid bench the broken carts and templates are checked against."""
    return load_bench(MINI / "mini-bench.toml").bench
