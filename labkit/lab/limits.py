"""Message and upload size limits shared by the server launcher and the capture upload widget.

Tornado drops a websocket message above ``websocket_max_message_size`` (10 MiB by default) without an
error in the notebook (ipywidgets#2522), and an ipywidgets 8 FileUpload sends the whole file in one
message. ``labkit lab`` raises the server's limit to :data:`SERVER_MESSAGE_LIMIT_BYTES`; the upload
widget accepts files up to :data:`UPLOAD_LIMIT_BYTES` (well below it) and refuses larger ones with a
visible message, so a file between the two limits is always reported. The launcher passes the
limits to the kernels through environment variables, so a notebook served by another command shows
the limits that really apply (Tornado's default when the variables are missing).
"""

from __future__ import annotations

import os

MIB = 1024 * 1024
TORNADO_DEFAULT_MESSAGE_BYTES = 10 * MIB
"""Tornado's default websocket_max_message_size (tornado.websocket, common practice: 10 MiB)."""
SERVER_MESSAGE_LIMIT_BYTES = 512 * MIB
"""The websocket message limit (and max_buffer_size) ``labkit lab`` gives the server."""
UPLOAD_LIMIT_BYTES = 200 * MIB
"""Largest capture file the upload widget accepts when the server limit is raised."""
MESSAGE_OVERHEAD_BYTES = 1 * MIB
"""Room left for the JSON part of an upload message."""
ENV_SERVER_LIMIT = "LABKIT_SERVER_MESSAGE_LIMIT"
ENV_UPLOAD_LIMIT = "LABKIT_UPLOAD_LIMIT"


def server_message_limit() -> int:
    """The websocket message limit of the server this kernel runs under, bytes (Tornado's default if unknown)."""
    return _env_int(ENV_SERVER_LIMIT, TORNADO_DEFAULT_MESSAGE_BYTES)


def upload_limit() -> int:
    """The largest file the upload widget accepts, bytes: the launcher's setting, else fits the server limit."""
    server = server_message_limit()
    fits = max(server - MESSAGE_OVERHEAD_BYTES, 0)
    return min(_env_int(ENV_UPLOAD_LIMIT, fits), fits)


def _env_int(name: str, default: int) -> int:
    text = os.environ.get(name, "").strip()
    if not text:
        return default
    try:
        value = int(text)
    except ValueError:
        return default
    return value if value > 0 else default


def describe_bytes(n: int) -> str:
    """``209715200`` -> ``"200 MiB"`` (binary units, as file managers of lab laptops show them)."""
    if n >= MIB:
        return f"{n / MIB:.0f} MiB" if n % MIB == 0 else f"{n / MIB:.1f} MiB"
    if n >= 1024:
        return f"{n / 1024:.0f} KiB"
    return f"{n} bytes"
