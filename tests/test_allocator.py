"""The front ends' allocator setting (labkit.lab.allocator).

Outside reference: glibc's mallopt(3) manual: blocks at or above M_MMAP_THRESHOLD are served by
fresh mmap regions and unmapped when freed; raising the threshold (its 64-bit maximum is 32 MiB)
and M_TRIM_THRESHOLD keeps freed memory in the heap for the next allocation. The check counts the
kernel's minor page faults (getrusage(2)) of a loop that allocates and frees a few MB-sized arrays.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap

import pytest

from labkit.lab import allocator

LOOP = textwrap.dedent("""
    import resource, sys
    import numpy as np
    from labkit.lab.allocator import keep_freed_blocks
    applied = keep_freed_blocks() if sys.argv[1] == "set" else False

    def block():  # the temporaries of one sample block: a few arrays of 1.6 to 3.2 MB alive together
        arrays = [np.ones(n) for n in (200_000, 400_000, 300_000, 250_000)]
        del arrays

    block()
    before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    for _ in range(40):
        block()
    print(int(applied), resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before)
""")



def _faults(mode: str) -> tuple[bool, int]:
    env = {k: v for k, v in os.environ.items() if k not in allocator.ENVIRONMENT and k != allocator.OPT_OUT}
    out = subprocess.run([sys.executable, "-c", LOOP, mode], capture_output=True, text=True, check=True, env=env)
    applied, faults = out.stdout.split()
    return applied == "1", int(faults)


def test_kept_blocks_are_not_faulted_in_again() -> None:
    applied, kept = _faults("set")
    if not applied:
        pytest.skip("not glibc: the setting does not apply")
    _, fresh = _faults("leave")
    assert fresh >= 40 * 1000  # 8.4 MB a block: about 2,000 pages of 4 KiB faulted in again each time
    assert kept < fresh / 20


def test_user_settings_and_the_opt_out_win() -> None:
    assert allocator.wanted({})
    assert not allocator.wanted({allocator.OPT_OUT: "1"})
    assert not allocator.wanted({"MALLOC_MMAP_THRESHOLD_": "131072"})
    assert allocator.child_environment({}) == allocator.ENVIRONMENT
    assert allocator.child_environment({allocator.OPT_OUT: "1"}) == {}


def test_kernels_started_by_the_launcher_get_the_setting(tmp_path, monkeypatch: pytest.MonkeyPatch) -> None:
    pytest.importorskip("jupyterlab")
    from labkit.lab.server import build_launch
    from labkit.lab.workfolder import prepare_folder

    for key in (*allocator.ENVIRONMENT, allocator.OPT_OUT):
        monkeypatch.delenv(key, raising=False)
    prep = prepare_folder(tmp_path / "w")
    launch = build_launch(prep.folder, prep.notebook, open_browser=False, allow_root=False)
    assert all(launch.env[k] == v for k, v in allocator.ENVIRONMENT.items())
    monkeypatch.setenv(allocator.OPT_OUT, "1")
    launch = build_launch(prep.folder, prep.notebook, open_browser=False, allow_root=False)
    assert not set(allocator.ENVIRONMENT) & set(launch.env)
