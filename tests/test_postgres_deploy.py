"""The deployment files: the Binder start script prepares the working folder; the JupyterHub example config.

Outside reference: JupyterHub's documented config object and ``Spawner.environment`` accepting callables
of the spawner (JupyterHub documentation, "Spawners", recalled from memory); repo2docker runs
``binder/start`` with the server command as its arguments (repo2docker documentation, recalled from memory).
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path
from types import SimpleNamespace

import pytest

ROOT = Path(__file__).resolve().parents[1]


def test_binder_start_prepares_the_folder_and_runs_the_command(tmp_path: Path):
    env = {**os.environ, "HOME": str(tmp_path)}
    env.pop("LABKIT_ARCHIVE", None)
    env["PATH"] = f"{Path(sys.executable).parent}:{env['PATH']}"
    out = subprocess.run(["bash", str(ROOT / "binder" / "start"), sys.executable, "-c",
                          "import os; print(os.environ['LABKIT_ARCHIVE'])"], env=env, capture_output=True,
                         text=True, timeout=120, check=False)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == str(tmp_path / "labkit-work" / "archive" / "logbook.sqlite")
    assert (tmp_path / "labkit-work" / "starter.ipynb").is_file()
    post = (ROOT / "binder" / "postBuild").read_text()
    assert '"/lab/tree/labkit-work/starter.ipynb"' in post  # where binder/start puts the notebook


class _Config(SimpleNamespace):
    def __getattr__(self, name: str):
        value = _Config()
        setattr(self, name, value)
        return value


def _load_hub_config(env: dict[str, str]) -> _Config:
    config = _Config()
    code = (ROOT / "deploy" / "jupyterhub" / "jupyterhub_config.py").read_text()
    old = dict(os.environ)
    os.environ.update(env)
    try:
        exec(compile(code, "jupyterhub_config.py", "exec"), {"get_config": lambda: config, "__name__": "cfg"})
    finally:
        os.environ.clear()
        os.environ.update(old)
    return config


def test_hub_config_gives_each_user_their_own_login_url():
    c = _load_hub_config({"LABKIT_ARCHIVE_URL": "postgresql://{username}@db.invalid:5432/labkit"})
    spawner = SimpleNamespace(user=SimpleNamespace(name="s1042"))
    assert c.Spawner.environment["LABKIT_ARCHIVE"](spawner) == "postgresql://s1042@db.invalid:5432/labkit"
    assert c.Spawner.notebook_dir == "~/labkit-work"
    for bad in ("labkit_owner", "bad name; DROP", ""):
        with pytest.raises(ValueError, match="cannot be a database login"):
            c.Spawner.environment["LABKIT_ARCHIVE"](SimpleNamespace(user=SimpleNamespace(name=bad)))


@pytest.mark.parametrize("url", ["", "postgresql://db/labkit", "postgresql://{username}:pw@db/labkit",
                                 "mysql://{username}@db/labkit"])
def test_hub_config_refuses_a_bad_archive_url(url):
    with pytest.raises(SystemExit):
        _load_hub_config({"LABKIT_ARCHIVE_URL": url})
