"""Offline install of the lab front end from a wheelhouse (docs/offline-install.md), checked in a fresh venv.

Step 1 (online, once): ``pip wheel --wheel-dir WH ".[lab]" voila`` with the pins of the lab extra.
Step 2 (offline): ``python -m venv V && V/bin/pip install --no-index --find-links WH "labkit[lab]" voila``.
Then in that venv: the widget stack imports, the lab extensions are installed and enabled, the demo files
are found, and the starter notebook executes (nbclient) and displays the app. About a minute on 2 cores.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent
# The versions checked together (../shared/browser-testing/RECIPE.md "Versions verified", and this suite)
LAB_PINS = ("jupyterlab==4.6.6", "ipywidgets==8.1.9", "bqplot==0.13.1", "voila==0.5.13",
            "jupyterlab_widgets==3.0.17", "widgetsnbextension==4.0.16", "ipykernel==7.4.0", "nbclient==0.11.0")

STARTER_CHECK = """
import json, sys
from pathlib import Path
import nbformat
from nbclient import NotebookClient
from labkit.lab.workfolder import prepare_folder
from labkit.demo_files import demo_folder
prep = prepare_folder(Path(sys.argv[1]))
nb = nbformat.read(prep.notebook, as_version=4)
NotebookClient(nb, timeout=180, kernel_name="python3", resources={"metadata": {"path": str(prep.folder)}}).execute()
outs = [o for c in nb.cells if c.cell_type == "code" for o in c.outputs]
print(json.dumps({"demo": str(demo_folder()), "errors": [o.get("ename") for o in outs if o.output_type == "error"],
                  "views": sum("application/vnd.jupyter.widget-view+json" in o.get("data", {}) for o in outs)}))
"""


def _run(cmd: list[str], **kw) -> subprocess.CompletedProcess:
    out = subprocess.run(cmd, capture_output=True, text=True, **kw)
    assert out.returncode == 0, f"{' '.join(cmd)}\n{out.stdout[-3000:]}\n{out.stderr[-3000:]}"
    return out


@pytest.mark.slow
def test_lab_extra_installs_from_a_wheelhouse_without_an_index(tmp_path):
    wheelhouse = tmp_path / "wheelhouse"
    constraints = tmp_path / "pins.txt"
    constraints.write_text("\n".join(LAB_PINS) + "\n")
    _run([sys.executable, "-m", "pip", "wheel", "--quiet", "--wheel-dir", str(wheelhouse), "-c", str(constraints),
          f"{REPO}[lab]", "voila"])
    venv = tmp_path / "fresh"
    _run([sys.executable, "-m", "venv", str(venv)])
    py = venv / "bin" / "python"
    env = {k: v for k, v in os.environ.items() if not k.startswith(("PIP_", "JUPYTER", "PYTHONPATH"))}
    env |= {"PIP_NO_INDEX": "1", "PIP_CONFIG_FILE": os.devnull}  # nothing but the wheelhouse
    _run([str(py), "-m", "pip", "install", "--quiet", "--no-index", "--find-links", str(wheelhouse),
          "labkit[lab]", "voila"], env=env, cwd=tmp_path)
    home = tmp_path / "home"
    env |= {"HOME": str(home), "JUPYTER_PLATFORM_DIRS": "1", "JUPYTER_CONFIG_DIR": str(home / "cfg"),
            "JUPYTER_DATA_DIR": str(home / "data"), "JUPYTER_RUNTIME_DIR": str(home / "run")}
    ext = _run([str(venv / "bin" / "jupyter"), "labextension", "list"], env=env, cwd=tmp_path)
    listing = ext.stdout + ext.stderr
    assert "@jupyter-widgets/jupyterlab-manager" in listing
    assert "bqplot" in listing
    assert listing.count("enabled") >= 2
    help_text = _run([str(py), "-m", "labkit.cli.lab", "--help"], env=env, cwd=tmp_path).stdout
    assert "--listen" in help_text
    assert "--app" in help_text
    result = json.loads(_run([str(py), "-c", STARTER_CHECK, str(tmp_path / "work")], env=env,
                             cwd=tmp_path).stdout.strip().splitlines()[-1])
    assert result["errors"] == []
    assert result["views"] >= 1
    assert str(venv) in result["demo"]  # the demo files came with the wheel, not from the checkout
