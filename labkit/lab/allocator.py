"""How labkit's own processes set up the C allocator, so the tolerance bands' sample blocks reuse memory.

The bands solve thousands of samples in blocks, each block allocating arrays of a few MiB. glibc's
malloc serves such sizes with fresh ``mmap`` regions and gives them back when freed (or trims the
heap), so every block touches new pages, and a page fault costs microseconds on a virtual machine:
measured about a quarter of a 10,000-sample band. Raising ``M_MMAP_THRESHOLD`` (to glibc's maximum,
32 MiB on 64-bit) and ``M_TRIM_THRESHOLD`` keeps freed blocks for the next one. The cost is that a
process holds on to its peak heap instead of returning it to the system.

Only labkit's front ends do this: the ``labkit`` command for itself, and ``labkit lab`` for the
kernels it starts (through glibc's environment variables). Importing labkit changes nothing. Set
``LABKIT_SYSTEM_MALLOC=1`` to leave the allocator as it is; variables a user has set win.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os
from collections.abc import Mapping

MMAP_THRESHOLD_BYTES = 32 * 1024 * 1024  # glibc's upper limit for M_MMAP_THRESHOLD on 64-bit (mallopt(3))
TRIM_THRESHOLD_BYTES = 256 * 1024 * 1024
OPT_OUT = "LABKIT_SYSTEM_MALLOC"
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3  # from glibc's malloc.h
ENVIRONMENT = {"MALLOC_MMAP_THRESHOLD_": str(MMAP_THRESHOLD_BYTES), "MALLOC_TRIM_THRESHOLD_": str(TRIM_THRESHOLD_BYTES)}
"""glibc's environment form of the same settings, for processes labkit starts."""


def wanted(environ: Mapping[str, str] | None = None) -> bool:
    """Whether labkit should set the allocator: not opted out, and no MALLOC_ variable already set."""
    env = os.environ if environ is None else environ
    return env.get(OPT_OUT, "") in ("", "0") and not any(key in env for key in ENVIRONMENT)


def keep_freed_blocks() -> bool:
    """Set this process's glibc malloc thresholds (see the module text); False where not glibc or not wanted."""
    if not wanted():
        return False
    name = ctypes.util.find_library("c")
    if not name:
        return False
    try:
        libc = ctypes.CDLL(name)
        mallopt = libc.mallopt
    except (OSError, AttributeError):  # not glibc (musl, macOS, Windows): nothing to set
        return False
    return bool(mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD_BYTES)) and bool(mallopt(_M_TRIM_THRESHOLD,
                                                                                    TRIM_THRESHOLD_BYTES))


def child_environment(environ: Mapping[str, str] | None = None) -> dict[str, str]:
    """Environment additions that give a started process (a kernel) the same settings; empty when not wanted."""
    return dict(ENVIRONMENT) if wanted(environ) else {}
