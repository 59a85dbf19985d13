"""JupyterHub configuration example for a department running labkit with the shared PostgreSQL archive.

Each person logs in to the hub with their own account (system accounts through PAM here; any
authenticator whose user names equal the database logins works). Their server starts in their own
working folder ``~/labkit-work`` (starter notebook, demo roster, captures/, reports/) and gets
``LABKIT_ARCHIVE`` pointing at the shared archive *as their own database login*, so row-level
security on the server decides what they may read and write. No database password is in this file
or in the environment: each user's ``~/.pgpass`` (mode 0600) holds their own, written when the
instructor creates the login (see README.md).

Settings from the hub's environment:

``LABKIT_ARCHIVE_URL``
    The shared archive with ``{username}`` where the login goes, e.g.
    ``postgresql://{username}@archive-db.internal:5432/labkit?sslmode=verify-full`` (required).
``LABKIT_HUB_BIND_URL``
    Where the hub listens (default ``http://127.0.0.1:8000``; put a TLS proxy in front of it).
"""

from __future__ import annotations

import os
import pwd
import re
from pathlib import Path
from typing import Any

c = get_config()  # noqa: F821 (provided by JupyterHub when it loads this file)

ARCHIVE_TEMPLATE = os.environ.get("LABKIT_ARCHIVE_URL", "")
if "{username}" not in ARCHIVE_TEMPLATE or not ARCHIVE_TEMPLATE.startswith(("postgresql://", "postgres://")):
    msg = ("LABKIT_ARCHIVE_URL must be a postgresql:// URL with {username} where the login goes, e.g. "
           "postgresql://{username}@archive-db.internal:5432/labkit?sslmode=verify-full")
    raise SystemExit(msg)
if re.search(r"//[^/@]*:[^/@]*@", ARCHIVE_TEMPLATE):
    msg = "LABKIT_ARCHIVE_URL must not hold a password: each user's ~/.pgpass does"
    raise SystemExit(msg)

WORK_FOLDER = "labkit-work"
SAFE_LOGIN = re.compile(r"^[a-z][a-z0-9_]{0,62}$")  # the same names are PostgreSQL logins


def archive_url(spawner: Any) -> str:
    """The user's own archive URL (their login in place of {username})."""
    name = spawner.user.name
    if not SAFE_LOGIN.match(name) or name.startswith("labkit_"):
        msg = f"user name {name!r} cannot be a database login (lowercase letters, digits, _; not labkit_*)"
        raise ValueError(msg)
    return ARCHIVE_TEMPLATE.format(username=name)


def prepare_work_folder(spawner: Any) -> None:
    """Create ~/labkit-work for the user (owned by them) before their server starts."""
    import subprocess

    home = Path(pwd.getpwnam(spawner.user.name).pw_dir)
    # run as the user, so every file in the folder is theirs
    subprocess.run(["runuser", "-u", spawner.user.name, "--", "python3", "-c",
                    "import sys; from labkit.lab.workfolder import prepare_folder; prepare_folder(sys.argv[1])",
                    str(home / WORK_FOLDER)], check=True, timeout=60)


c.JupyterHub.bind_url = os.environ.get("LABKIT_HUB_BIND_URL", "http://127.0.0.1:8000")
c.JupyterHub.authenticator_class = "jupyterhub.auth.PAMAuthenticator"
c.Authenticator.allow_existing_users = True
c.Authenticator.admin_users = set(filter(None, os.environ.get("LABKIT_HUB_ADMINS", "").split(",")))

c.JupyterHub.spawner_class = "jupyterhub.spawner.LocalProcessSpawner"
c.Spawner.pre_spawn_hook = prepare_work_folder
c.Spawner.notebook_dir = f"~/{WORK_FOLDER}"
c.Spawner.default_url = "/lab/tree/starter.ipynb"
c.Spawner.environment = {
    "LABKIT_ARCHIVE": archive_url,  # JupyterHub calls it with the spawner
    "PGPASSFILE": lambda spawner: str(Path(pwd.getpwnam(spawner.user.name).pw_dir) / ".pgpass"),
}
# a lab session holds kernels for hours; idle servers are stopped by the hub's idle culler if installed
c.Spawner.mem_limit = os.environ.get("LABKIT_HUB_MEM_LIMIT", "2G")
