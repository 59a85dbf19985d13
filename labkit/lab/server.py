"""Build and run the JupyterLab (or Voila app-mode) server of ``labkit lab``.

Defaults keep the server private to the machine: it binds 127.0.0.1 on a free port with a fresh
random token (never an empty one). Serving other machines needs ``--listen ADDR`` and prints a
warning. The websocket message limit and ``max_buffer_size`` are raised for capture uploads
(:mod:`labkit.lab.limits`) and the kernels learn the limits through their environment.
"""

from __future__ import annotations

import json
import os
import secrets
import socket
import subprocess
import sys
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from urllib.parse import quote

from labkit.lab import allocator
from labkit.lab.limits import (
    ENV_SERVER_LIMIT,
    ENV_UPLOAD_LIMIT,
    SERVER_MESSAGE_LIMIT_BYTES,
    UPLOAD_LIMIT_BYTES,
    describe_bytes,
)

LOOPBACK = "127.0.0.1"


class LaunchError(RuntimeError):
    """The server cannot be started as asked (missing package, bad address or port)."""


@dataclass(frozen=True)
class Launch:
    """A server command ready to run: argv, environment additions, and the URL to open."""

    argv: list[str]
    env: dict[str, str]
    url: str
    token: str
    host: str
    port: int
    mode: str  # "lab" or "app"
    warnings: tuple[str, ...] = ()

    def status_url(self) -> str:
        """The readiness probe: JupyterLab's ``/api/status`` (Voila: the page root)."""
        base = f"http://{_url_host(self.host)}:{self.port}"
        return f"{base}/api/status?token={self.token}" if self.mode == "lab" else f"{base}/?token={self.token}"


def free_port(host: str = LOOPBACK) -> int:
    """A TCP port free on ``host`` right now (the OS picks it)."""
    with socket.socket(socket.AF_INET6 if ":" in host else socket.AF_INET) as s:
        s.bind((host, 0))
        return int(s.getsockname()[1])


def _url_host(host: str) -> str:
    if host in ("0.0.0.0", "::", ""):
        return LOOPBACK
    return f"[{host}]" if ":" in host else host


def _check_address(host: str) -> None:
    try:
        socket.getaddrinfo(host, None)
    except OSError as exc:
        msg = f'--listen "{host}": not an address of this machine ({exc.strerror or exc})'
        raise LaunchError(msg) from exc


def build_launch(folder: Path, notebook: Path, *, mode: str = "lab", port: int | None = None,
                 listen: str | None = None, open_browser: bool = True, allow_root: bool | None = None,
                 token: str | None = None, python: str | None = None,
                 message_limit: int = SERVER_MESSAGE_LIMIT_BYTES, upload_limit: int = UPLOAD_LIMIT_BYTES,
                 extra_args: Sequence[str] = ()) -> Launch:
    """The server command for a working folder.

    Parameters
    ----------
    folder
        The working folder (the server's root directory).
    notebook
        The notebook to open (inside ``folder``).
    mode
        ``"lab"`` (JupyterLab) or ``"app"`` (Voila: only the widgets).
    port
        TCP port; ``None`` picks a free one.
    listen
        Address to bind; ``None`` binds 127.0.0.1 (this machine only).
    open_browser
        Let the server open a browser tab.
    allow_root
        Pass ``--allow-root`` (Jupyter refuses to run as root without it); ``None``: when running as root.
    token
        The access token; ``None`` makes a fresh random one. An empty token is refused.
    python
        The interpreter to run the server with (default: this one).
    message_limit, upload_limit
        Websocket message limit given to the server, and the upload widget's file limit, bytes.
    extra_args
        More arguments for the server.
    """
    if mode not in ("lab", "app"):
        msg = f'mode "{mode}": expected "lab" or "app"'
        raise LaunchError(msg)
    if token is not None and not token.strip():
        msg = "an empty token would let anyone who reaches the port run code; give a token or let labkit make one"
        raise LaunchError(msg)
    if upload_limit >= message_limit:
        msg = f"upload limit {upload_limit} bytes must be below the server's message limit {message_limit} bytes"
        raise LaunchError(msg)
    host = listen or LOOPBACK
    warnings: list[str] = []
    if listen is not None:
        _check_address(listen)
        if listen not in (LOOPBACK, "localhost", "::1"):
            warnings.append(f"serving on {listen}: other machines that reach this address can use the server "
                            "(and run code in it) with the token. Use it only on a network you trust.")
    port = free_port(LOOPBACK if listen is None else host) if port is None else int(port)
    if not 0 < port < 65536:
        msg = f"--port {port}: expected a TCP port 1..65535"
        raise LaunchError(msg)
    tok = token or secrets.token_urlsafe(24)
    py = python or sys.executable
    root_flag = (os.geteuid() == 0) if allow_root is None and hasattr(os, "geteuid") else bool(allow_root)
    tornado = json.dumps({"websocket_max_message_size": int(message_limit)})
    env = {ENV_SERVER_LIMIT: str(int(message_limit)), ENV_UPLOAD_LIMIT: str(int(upload_limit))}
    env |= allocator.child_environment()  # kernels keep freed sample blocks (labkit.lab.allocator)
    rel = notebook.resolve().relative_to(folder.resolve()).as_posix()
    base = f"http://{_url_host(host)}:{port}"
    if mode == "lab":
        _require("jupyterlab", "labkit lab")
        env["JUPYTER_TOKEN"] = tok  # kept out of argv, so other users' `ps` does not show it
        argv = [py, "-m", "jupyterlab", f"--ServerApp.ip={host}", f"--ServerApp.port={port}",
                "--ServerApp.port_retries=0", f"--ServerApp.root_dir={folder}",
                f"--ServerApp.tornado_settings={tornado}", f"--ServerApp.max_buffer_size={int(message_limit)}",
                f"--ServerApp.max_body_size={int(message_limit)}", "--ServerApp.terminals_enabled=False",
                "--LabApp.extension_manager=readonly", f"--LabApp.default_url=/lab/tree/{quote(rel)}"]
        if not open_browser:
            argv.append("--no-browser")
        url = f"{base}/lab/tree/{quote(rel)}?token={tok}"
    else:
        _require("voila", "labkit lab --app")
        argv = [py, "-m", "voila", str(notebook), f"--Voila.ip={host}", f"--Voila.port={port}",
                "--Voila.port_retries=0", f"--Voila.root_dir={folder}", f"--Voila.token={tok}",
                f"--Voila.tornado_settings={tornado}", f"--ServerApp.max_buffer_size={int(message_limit)}",
                f"--ServerApp.max_body_size={int(message_limit)}", "--show_tracebacks=False"]
        if not open_browser:
            argv.append("--no-browser")
        url = f"{base}/?token={tok}"
    if root_flag:
        argv.append("--allow-root" if mode == "lab" else "--ServerApp.allow_root=True")
    argv += list(extra_args)
    return Launch(argv, env, url, tok, host, port, mode, tuple(warnings))


def _require(module: str, command: str) -> None:
    import importlib.util

    if importlib.util.find_spec(module) is None:
        msg = (f"{command} needs the {module} package: install labkit with its lab extra "
               '(pip install "labkit[lab]"; offline: docs/offline-install.md)')
        raise LaunchError(msg)


def launch_banner(launch: Launch, folder: Path, notes: Sequence[str] = ()) -> str:
    """The lines printed before the server starts."""
    what = "JupyterLab" if launch.mode == "lab" else "the lab app (widgets only)"
    lines = [f"labkit: starting {what} on {folder}",
             f"  open: {launch.url}",
             f"  capture uploads up to {describe_bytes(int(launch.env[ENV_UPLOAD_LIMIT]))} per file "
             f"(server message limit {describe_bytes(int(launch.env[ENV_SERVER_LIMIT]))}); larger files: copy them "
             f"into {folder / 'captures'} and pick them in the capture panel",
             "  stop: Ctrl+C"]
    lines += [f"  note: {n}" for n in notes]
    lines += [f"  WARNING: {w}" for w in launch.warnings]
    return "\n".join(lines)


def run(launch: Launch, *, cwd: Path, env: Mapping[str, str] | None = None) -> int:
    """Run the server in the foreground until it exits (Ctrl+C stops it); return its exit code."""
    full_env = dict(os.environ if env is None else env)
    full_env |= launch.env
    proc = subprocess.Popen(launch.argv, cwd=cwd, env=full_env)
    try:
        return proc.wait()
    except KeyboardInterrupt:
        proc.terminate()
        try:
            return proc.wait(timeout=15)
        except subprocess.TimeoutExpired:
            proc.kill()
            return proc.wait()
