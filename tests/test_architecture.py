"""The layers' one-way dependencies and the light ``import labkit`` (common practice: keep a package's import cheap).

Layers: ``labkit.core`` (numeric core) <- ``labkit.files``/``labkit.captures``/``labkit.logbook``/``labkit.session``
<- front ends (``labkit.cli``, ``labkit.report``, ``labkit.widgets``). A lower layer never imports a higher one, and
nothing outside ``labkit.widgets`` imports ipywidgets or bqplot.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parent.parent / "labkit"
FRONT_ENDS = ("labkit.cli", "labkit.report", "labkit.widgets", "labkit.lab")
MIDDLE = ("labkit.files", "labkit.captures", "labkit.logbook", "labkit.session")
WIDGET_LIBS = ("ipywidgets", "bqplot", "traitlets", "IPython")


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text())
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names |= {a.name for a in node.names}
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module)
    return names


def _modules(sub: str) -> list[Path]:
    return sorted((PACKAGE / sub).rglob("*.py")) if (PACKAGE / sub).is_dir() else []


@pytest.mark.parametrize("path", _modules("core"), ids=lambda p: p.name)
def test_core_imports_no_higher_layer_and_no_widgets(path: Path) -> None:
    bad = {n for n in _imports(path) if n.startswith((*FRONT_ENDS, *MIDDLE, *WIDGET_LIBS))}
    assert not bad, f"{path.name} imports {bad}"


@pytest.mark.parametrize("path", [p for sub in ("files", "captures", "logbook", "session") for p in _modules(sub)],
                         ids=lambda p: f"{p.parent.name}/{p.name}")
def test_middle_layer_imports_no_front_end(path: Path) -> None:
    bad = {n for n in _imports(path) if n.startswith((*FRONT_ENDS, *WIDGET_LIBS))}
    assert not bad, f"{path} imports {bad}"


def test_import_labkit_is_light() -> None:
    code = ("import sys, labkit; heavy = [m for m in ('numpy', 'pandas', 'pydantic', 'scipy', 'pint', 'ipywidgets')"
            " if m in sys.modules]; print(','.join(heavy))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.strip()
    assert out == "", f"import labkit pulled in {out}"


def test_core_and_session_layers_do_not_load_widget_libraries() -> None:
    code = ("import sys, importlib, pkgutil, labkit\n"
            "for sub in ('core', 'files', 'captures', 'logbook', 'session'):\n"
            "    try:\n        pkg = importlib.import_module('labkit.' + sub)\n"
            "    except ImportError:\n        continue\n"
            "    for m in pkgutil.iter_modules(pkg.__path__):\n"
            "        importlib.import_module(f'labkit.{sub}.{m.name}')\n"
            "print(','.join(m for m in ('ipywidgets', 'bqplot') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.strip()
    assert out == ""
