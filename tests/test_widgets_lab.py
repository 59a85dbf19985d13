"""``labkit lab``: the working folder, the server command, and the real command started headlessly.

The subprocess test runs the README's first command the way a user does (``--no-browser`` on a free
loopback port), checks the server answers ``/api/status`` with the printed token, executes the starter
notebook (nbclient, in the working folder) and stops the server's process group.
"""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path

import pytest

from labkit.lab.limits import ENV_SERVER_LIMIT, ENV_UPLOAD_LIMIT, SERVER_MESSAGE_LIMIT_BYTES
from labkit.lab.server import LOOPBACK, LaunchError, build_launch
from labkit.lab.workfolder import STARTER_NAME, STARTER_NEW_NAME, prepare_folder, starter_text

REPO = Path(__file__).resolve().parent.parent


def test_prepare_folder_writes_starter_and_keeps_user_edits(tmp_path):
    first = prepare_folder(tmp_path / "w")
    nb = first.folder / STARTER_NAME
    assert nb in first.written
    assert json.loads(nb.read_text())["nbformat"] == 4
    again = prepare_folder(tmp_path / "w")
    assert nb in again.kept
    assert not again.written
    nb.write_text(nb.read_text().replace("LabApp.for_folder", "LabApp.for_folder  # my note"))
    edited = prepare_folder(tmp_path / "w")
    assert "my note" in nb.read_text()  # never overwritten
    assert (first.folder / STARTER_NEW_NAME).read_text() == starter_text()
    assert edited.notes


def test_prepare_folder_refuses_a_file(tmp_path):
    (tmp_path / "f").write_text("x")
    with pytest.raises(NotADirectoryError, match="is a file"):
        prepare_folder(tmp_path / "f")


def test_lab_command_is_private_by_default(tmp_path):
    pytest.importorskip("jupyterlab")
    prep = prepare_folder(tmp_path / "w")
    launch = build_launch(prep.folder, prep.notebook, open_browser=False, allow_root=False)
    args = " ".join(launch.argv)
    assert f"--ServerApp.ip={LOOPBACK}" in args
    assert "--no-browser" in args
    assert "--allow-root" not in args
    assert len(launch.token) >= 24
    assert launch.token not in args
    assert launch.env["JUPYTER_TOKEN"] == launch.token
    assert launch.warnings == ()
    settings = next(a for a in launch.argv if a.startswith("--ServerApp.tornado_settings="))
    assert json.loads(settings.partition("=")[2]) == {"websocket_max_message_size": SERVER_MESSAGE_LIMIT_BYTES}
    assert f"--ServerApp.max_buffer_size={SERVER_MESSAGE_LIMIT_BYTES}" in launch.argv
    assert int(launch.env[ENV_UPLOAD_LIMIT]) < int(launch.env[ENV_SERVER_LIMIT])
    assert launch.url.startswith(f"http://{LOOPBACK}:{launch.port}/lab/tree/starter.ipynb?token=")
    other = build_launch(prep.folder, prep.notebook, allow_root=False)
    assert other.token != launch.token  # a fresh random token per launch


def test_lab_command_warns_when_listening_for_other_machines(tmp_path):
    pytest.importorskip("jupyterlab")
    prep = prepare_folder(tmp_path / "w")
    launch = build_launch(prep.folder, prep.notebook, listen="0.0.0.0", port=18999, allow_root=True)
    assert any("other machines" in w for w in launch.warnings)
    assert "--ServerApp.ip=0.0.0.0" in launch.argv
    assert "--allow-root" in launch.argv
    with pytest.raises(LaunchError, match="empty token"):
        build_launch(prep.folder, prep.notebook, token=" ")


def test_app_mode_serves_with_voila_and_the_raised_limit(tmp_path):
    pytest.importorskip("voila")
    prep = prepare_folder(tmp_path / "w")
    launch = build_launch(prep.folder, prep.notebook, mode="app", allow_root=False)
    settings = next(a for a in launch.argv if a.startswith("--Voila.tornado_settings="))
    assert json.loads(settings.partition("=")[2])["websocket_max_message_size"] == SERVER_MESSAGE_LIMIT_BYTES
    assert any(a.startswith("--Voila.token=") and len(a) > 30 for a in launch.argv)
    assert f"--Voila.ip={LOOPBACK}" in launch.argv
    assert launch.argv[1:3] == ["-m", "voila"]


def _lab_command() -> list[str]:
    """``labkit lab`` through the CLI when it is wired in, else the same sub-command run on its own."""
    probe = subprocess.run([sys.executable, "-m", "labkit", "lab", "--help"], capture_output=True, text=True,
                           cwd=REPO)
    if probe.returncode == 0:
        return [sys.executable, "-m", "labkit", "lab"]
    return [sys.executable, "-m", "labkit.cli.lab"]


def _isolated_env(base: Path) -> dict[str, str]:
    env = dict(os.environ)
    for key, sub in (("JUPYTER_CONFIG_DIR", "config"), ("JUPYTER_DATA_DIR", "data"),
                     ("JUPYTER_RUNTIME_DIR", "runtime"), ("IPYTHONDIR", "ipython")):
        (base / sub).mkdir(parents=True, exist_ok=True)
        env[key] = str(base / sub)
    env["JUPYTER_PLATFORM_DIRS"] = "1"
    env["PATH"] = f"{Path(sys.executable).parent}{os.pathsep}{env.get('PATH', '')}"
    return env


@pytest.mark.slow
def test_labkit_lab_starts_answers_runs_the_starter_and_stops(tmp_path):
    pytest.importorskip("jupyterlab")
    nbclient = pytest.importorskip("nbclient")
    import nbformat

    folder = tmp_path / "work"
    cmd = [*_lab_command(), "--no-browser", "--folder", str(folder)]
    if hasattr(os, "geteuid") and os.geteuid() == 0:
        cmd.append("--allow-root")
    log = open(tmp_path / "lab.log", "w+")  # noqa: SIM115 - read back after the process ends
    proc = subprocess.Popen(cmd, cwd=tmp_path, env=_isolated_env(tmp_path / "jupyter"), stdout=log,
                            stderr=subprocess.STDOUT, start_new_session=True)
    try:
        token = ""
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and not token:
            assert proc.poll() is None, Path(log.name).read_text()
            m = re.search(r"open: (http://127\.0\.0\.1:(\d+)/\S*\?token=(\S+))", Path(log.name).read_text())
            if m:
                _url, port, token = m.group(1), int(m.group(2)), m.group(3)
            time.sleep(0.1)
        assert token, Path(log.name).read_text()
        status = None
        while time.monotonic() < deadline:
            try:
                with urllib.request.urlopen(f"http://127.0.0.1:{port}/api/status?token={token}", timeout=2) as r:
                    status = json.load(r)
                    break
            except (urllib.error.URLError, ConnectionError):
                time.sleep(0.2)
        assert status is not None, Path(log.name).read_text()
        assert "started" in status
        with pytest.raises(urllib.error.HTTPError):  # no token, no access
            urllib.request.urlopen(f"http://127.0.0.1:{port}/api/contents", timeout=5)
        assert "upload" in Path(log.name).read_text()  # the limit is told before any upload
        nb = nbformat.read(folder / STARTER_NAME, as_version=4)
        client = nbclient.NotebookClient(nb, timeout=180, kernel_name="python3",
                                         resources={"metadata": {"path": str(folder)}})
        client.execute()
        outputs = [o for c in nb.cells if c.cell_type == "code" for o in c.outputs]
        assert not [o for o in outputs if o.get("output_type") == "error"]
        assert any("application/vnd.jupyter.widget-view+json" in o.get("data", {}) for o in outputs)
        assert (folder / "archive" / "labkit-archive.sqlite").exists()
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGTERM)
            try:
                proc.wait(timeout=20)
            except subprocess.TimeoutExpired:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait(timeout=5)
        log.close()
