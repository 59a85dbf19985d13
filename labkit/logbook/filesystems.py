"""Which filesystem a folder is on, from ``/proc/self/mountinfo``; network filesystems are refused.

SQLite's locking and write-ahead log need a local filesystem: on NFS, SMB/CIFS, 9p or
sshfs the byte-range locks and the shared-memory index are unreliable, and two laptops
writing one file there can corrupt it (common practice; the SQLite documentation warns
against network filesystems). The archive therefore refuses them and says why.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

from labkit.logbook.storage import ArchiveError

NETWORK_FILESYSTEMS = frozenset({
    "nfs", "nfs4", "cifs", "smb3", "smbfs", "9p", "sshfs", "fuse.sshfs", "afs", "ceph", "glusterfs",
    "fuse.glusterfs", "lustre", "gfs2", "ocfs2", "davfs", "fuse.davfs2", "fuse.rclone", "fuse.s3fs", "ncpfs",
    "coda", "fuse.gvfsd-fuse",
})
"""Filesystem types (mountinfo's field after the ``-``) that labkit refuses to keep an archive on."""


@dataclass(frozen=True)
class Mount:
    """One line of mountinfo: where it is mounted, its filesystem type and source."""

    mount_point: str
    fstype: str
    source: str


def _unescape(field: str) -> str:
    """Undo mountinfo's octal escapes (``\\040`` for a space, ``\\011`` tab, ``\\012`` newline, ``\\134`` ``\\``)."""
    out, k = [], 0
    while k < len(field):
        if field[k] == "\\" and k + 3 < len(field) and field[k + 1:k + 4].isdigit():
            out.append(chr(int(field[k + 1:k + 4], 8)))
            k += 4
        else:
            out.append(field[k])
            k += 1
    return "".join(out)


def parse_mountinfo(text: str) -> list[Mount]:
    """The mounts listed in a mountinfo text (see proc(5)); malformed lines are skipped."""
    mounts = []
    for line in text.splitlines():
        fields = line.split()
        if "-" not in fields:
            continue
        sep = fields.index("-")
        if sep < 5 or len(fields) < sep + 3:
            continue
        mounts.append(Mount(_unescape(fields[4]), fields[sep + 1], _unescape(fields[sep + 2])))
    return mounts


def filesystem_of(path: str | Path, mountinfo: str | None = None) -> Mount | None:
    """The mount holding ``path`` (the longest mount point that contains it), or None if unknown.

    Parameters
    ----------
    path
        A file or folder; it need not exist.
    mountinfo
        mountinfo text to use instead of ``/proc/self/mountinfo`` (tests pass a fake one).
    """
    if mountinfo is None:
        try:
            mountinfo = Path("/proc/self/mountinfo").read_text()
        except OSError:
            return None  # not Linux, or /proc not mounted: nothing to go by
    resolved = os.path.realpath(path)  # symlinks resolved as far as the path exists
    best: Mount | None = None
    for mount in parse_mountinfo(mountinfo):
        point = mount.mount_point.rstrip("/") or "/"
        inside = resolved == point or resolved.startswith(point + "/") or point == "/"
        if inside and (best is None or len(point) >= len(best.mount_point.rstrip("/") or "/")):
            best = mount  # later lines of an equal point overmount the earlier ones
    return best


def is_network_filesystem(fstype: str) -> bool:
    """Whether labkit refuses an archive on a filesystem of this type."""
    lowered = fstype.lower()
    return lowered in NETWORK_FILESYSTEMS or lowered.startswith(("nfs", "smb", "fuse.sshfs"))


def refuse_network_filesystem(path: str | Path, mountinfo: str | None = None) -> None:
    """Raise :class:`ArchiveError` when ``path`` is on a network filesystem."""
    mount = filesystem_of(path, mountinfo)
    if mount is not None and is_network_filesystem(mount.fstype):
        msg = (f"{path}: the archive's folder is on a network filesystem ({mount.fstype} from {mount.source}, "
               f"mounted at {mount.mount_point}); SQLite's locks are unreliable there and the log could be "
               "corrupted. Keep the archive on the laptop's own disk and hand in a copy (labkit archive hand-in).")
        raise ArchiveError(msg)
