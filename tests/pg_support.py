"""A throwaway PostgreSQL server on loopback for the tests (Debian's ``postgresql`` package).

:func:`start_server` runs ``initdb`` into a temporary folder, starts ``postgres`` on 127.0.0.1 at
a free port with its unix socket in that folder (never the system's), creates the migration role
and the database, runs labkit's migrations, and returns a :class:`PgServer` that makes logins and
URLs. PostgreSQL refuses to run as root, so as root the server runs as the ``postgres`` system
user (``runuser``). :func:`stop` ends the server's process group. Tests skip when the binaries are
missing, except when ``CI`` is set: then they fail.
"""

from __future__ import annotations

import contextlib
import glob
import os
import pwd
import shutil
import signal
import socket
import subprocess
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

import pytest

OWNER = "labkit_owner"
OWNER_PASSWORD = "owner-secret-Xq7"  # test-only credential of a throwaway server
DATABASE = "labkit"


def find_bindir() -> Path | None:
    """The newest ``/usr/lib/postgresql/*/bin`` holding ``initdb`` and ``postgres``, else ``$PATH``'s."""
    candidates = sorted(glob.glob("/usr/lib/postgresql/*/bin"), key=lambda p: int(Path(p).parent.name)
                        if Path(p).parent.name.isdigit() else 0)
    for folder in reversed(candidates):
        if (Path(folder) / "initdb").exists() and (Path(folder) / "postgres").exists():
            return Path(folder)
    initdb = shutil.which("initdb")
    if initdb and shutil.which("postgres"):
        return Path(os.path.realpath(initdb)).parent
    return None


def require_postgres() -> Path:
    """The binaries' folder; skip the test when PostgreSQL is not installed (fail when ``CI`` is set)."""
    bindir = find_bindir()
    if bindir is None:
        msg = "PostgreSQL server binaries (initdb, postgres) not found: apt-get install -y postgresql"
        if os.environ.get("CI"):
            pytest.fail(msg)
        pytest.skip(msg)
    return bindir


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass
class PgServer:
    """A running throwaway server: where it is, and how to reach it as the owner or a login."""

    bindir: Path
    root: Path
    port: int
    process: subprocess.Popen[bytes]
    run_as: list[str]
    passwords: dict[str, str] = field(default_factory=dict)

    @property
    def socket_dir(self) -> Path:
        return self.root / "sock"

    def url(self, login: str = OWNER, password: str | None = None, database: str = DATABASE) -> str:
        """A ``postgresql://`` URL over TCP on 127.0.0.1 for ``login`` (its test password by default)."""
        pw = self.passwords.get(login, "") if password is None else password
        auth = f"{login}:{pw}@" if pw else f"{login}@"
        return f"postgresql://{auth}127.0.0.1:{self.port}/{database}"

    def superuser_sql(self, sql: str, database: str = "postgres") -> str:
        """Run SQL as the bootstrap superuser through the unix socket (psql); its output."""
        out = subprocess.run([str(self.bindir / "psql"), "-X", "-q", "-A", "-t", "-v", "ON_ERROR_STOP=1",
                              "-h", str(self.socket_dir), "-p", str(self.port), "-U", "postgres", "-d", database,
                              "-c", sql], capture_output=True, text=True, check=False, timeout=60)
        if out.returncode:
            msg = f"psql failed: {out.stderr}"
            raise RuntimeError(msg)
        return out.stdout

    def add_login(self, login: str, role: str, section: str = "", group: str = "") -> str:
        """Create a login with a password and its membership (through labkit's own add_member); its URL."""
        from labkit.logbook.postgres import add_member

        password = self.passwords.get(login) or f"pw-{login}-9Tz"
        add_member(self.url(), login, role, section=section, group=group, password=password)
        self.passwords[login] = password
        return self.url(login)

    def fresh_database(self, name: str) -> str:
        """A new database owned by the migration role, migrated; the owner's URL to it."""
        from labkit.logbook.postgres import migrate

        self.superuser_sql(f'CREATE DATABASE "{name}" OWNER {OWNER}')
        url = self.url(database=name)
        migrate(url)
        return url


def start_server(root: Path | None = None) -> PgServer:
    """Initialize and start a server in a temporary folder; raises RuntimeError if it does not come up."""
    bindir = require_postgres()
    root = Path(tempfile.mkdtemp(prefix="labkit-pg-")) if root is None else root
    data, sock = root / "data", root / "sock"
    sock.mkdir(parents=True, exist_ok=True)
    run_as: list[str] = []
    if os.geteuid() == 0:
        try:
            pw = pwd.getpwnam("postgres")
        except KeyError:
            msg = "running as root and there is no 'postgres' user to run the server as"
            raise RuntimeError(msg) from None
        for path in (root, sock):
            os.chown(path, pw.pw_uid, pw.pw_gid)
        os.chmod(root, 0o755)
        run_as = [shutil.which("runuser") or "/sbin/runuser", "-u", "postgres", "--"]
    init = subprocess.run([*run_as, str(bindir / "initdb"), "-D", str(data), "-U", "postgres", "-A", "trust",
                           "--auth-host=scram-sha-256", "-E", "UTF8", "--locale=C.UTF-8", "--no-sync"],
                          capture_output=True, text=True, check=False, timeout=120)
    if init.returncode:
        msg = f"initdb failed: {init.stderr[-2000:]}"
        raise RuntimeError(msg)
    port = _free_port()
    log = root / "server.log"
    log_handle = log.open("wb")
    if run_as:
        os.chown(log, pwd.getpwnam("postgres").pw_uid, pwd.getpwnam("postgres").pw_gid)
    process = subprocess.Popen(
        [*run_as, str(bindir / "postgres"), "-D", str(data), "-h", "127.0.0.1", "-p", str(port),
         "-k", str(sock), "-c", "max_connections=60", "-c", "shared_buffers=32MB", "-c", "fsync=on",
         "-c", "synchronous_commit=on", "-c", "password_encryption=scram-sha-256"],
        stdout=log_handle, stderr=subprocess.STDOUT, start_new_session=True)
    server = PgServer(bindir, root, port, process, run_as, {OWNER: OWNER_PASSWORD})
    deadline = time.monotonic() + 30
    while True:
        ready = subprocess.run([str(bindir / "pg_isready"), "-h", "127.0.0.1", "-p", str(port), "-q"],
                               check=False, timeout=10)
        if ready.returncode == 0:
            break
        if process.poll() is not None or time.monotonic() > deadline:
            stop(server)
            msg = f"postgres did not start: {log.read_text(errors='replace')[-2000:]}"
            raise RuntimeError(msg)
        time.sleep(0.1)
    from labkit.logbook.postgres import migrate

    try:
        server.superuser_sql(f"CREATE ROLE {OWNER} LOGIN CREATEROLE PASSWORD '{OWNER_PASSWORD}'")
        server.superuser_sql(f"CREATE DATABASE {DATABASE} OWNER {OWNER}")
        migrate(server.url())
    except BaseException:
        stop(server)  # never leave a server behind
        raise
    return server


def stop(server: PgServer) -> None:
    """Stop the server (its whole process group) and remove its folder."""
    if server.process.poll() is None:
        try:
            os.killpg(server.process.pid, signal.SIGINT)  # fast shutdown
            server.process.wait(timeout=20)
        except (ProcessLookupError, subprocess.TimeoutExpired):
            with contextlib.suppress(ProcessLookupError):
                os.killpg(server.process.pid, signal.SIGKILL)
            server.process.wait(timeout=10)
    shutil.rmtree(server.root, ignore_errors=True)


_SHARED: list[PgServer] = []


def shared_server() -> PgServer:
    """One server per test run, however many test modules import the fixture; stopped at interpreter exit."""
    if not _SHARED:
        import atexit

        _SHARED.append(start_server())
        atexit.register(stop, _SHARED[0])
    return _SHARED[0]


@pytest.fixture(scope="session")
def pg_server() -> PgServer:
    """The run's throwaway server with labkit migrated into database ``labkit`` (see :func:`shared_server`)."""
    return shared_server()
