"""Durable file operations of the shell: atomic writes and moves that survive a crash.

Owns: writing a file so that a reader never sees half of it (temporary file in the same
folder, fsync, rename, fsync of the folder), and moving an input into the archive or the
quarantine without losing it (rename; copy + fsync + unlink across file systems); at start,
removing the temporary files a crash left behind (only their naming pattern); and
:class:`Disk`, those writes and the free space of a folder as one object, the seam through
which the intake, the file transport and the disk-full watch reach the file system (a test
hands in one whose writes fail with ENOSPC).
"""

from __future__ import annotations

import errno
import os
import re
import shutil
import tempfile
from pathlib import Path

# "No space left on device" and "disk quota exceeded": a state of the disk, not of the file written.
NO_SPACE = frozenset({errno.ENOSPC, errno.EDQUOT})
# Below this many free bytes a folder counts as full, and a full one needs this much before the
# service tries it again: room for many inputs (one costs the ledger about 5 kB; its archived copy
# is its own size), so that one file taken does not fill it at once and the state does not flap.
ROOM_BYTES = 1 << 20

# The names of our own temporary files: ".<name>.<8 random characters>.tmp" (write_atomically,
# tempfile.mkstemp's alphabet) and ".<name>.tmp" (move_durably across file systems).
STRAY_TEMPORARY = re.compile(r"\..+?\.(?:[a-z0-9_]{8}\.)?tmp")


def remove_strays(folder: Path) -> list[Path]:
    """Delete the temporary files a crash left in ``folder`` (our naming pattern only); return them."""
    removed = []
    try:
        entries = list(os.scandir(folder))
    except FileNotFoundError:
        return []
    for entry in entries:
        if entry.is_file(follow_symlinks=False) and STRAY_TEMPORARY.fullmatch(entry.name):
            Path(entry.path).unlink(missing_ok=True)
            removed.append(Path(entry.path))
    if removed:
        sync_folder(folder)
    return removed


def write_atomically(target: Path, data: bytes) -> None:
    """Write ``data`` to ``target``: all of it or, after a crash, none of it."""
    target.parent.mkdir(parents=True, exist_ok=True)
    handle, temporary = tempfile.mkstemp(dir=target.parent, prefix=f".{target.name}.", suffix=".tmp")
    try:
        with os.fdopen(handle, "wb") as stream:
            stream.write(data)
            stream.flush()
            os.fsync(stream.fileno())
        os.replace(temporary, target)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise
    sync_folder(target.parent)


def sync_folder(folder: Path) -> None:
    """Make a rename in ``folder`` durable (its directory entry)."""
    descriptor = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(descriptor)
    finally:
        os.close(descriptor)


def free_name(folder: Path, name: str, tag: str) -> Path:
    """``folder/name``, or ``folder/name.<tag>`` (then numbered) when that is taken."""
    candidate = folder / name
    counter = 1
    while candidate.exists():
        suffix = tag if counter == 1 else f"{tag}-{counter}"
        candidate = folder / f"{name}.{suffix}"
        counter += 1
    return candidate


def move_durably(source: Path, target: Path) -> Path:
    """Move ``source`` to ``target`` (a free path) and make the move durable."""
    target.parent.mkdir(parents=True, exist_ok=True)
    try:
        os.replace(source, target)
    except OSError as exc:
        if exc.errno != errno.EXDEV:
            raise
        # Another file system: copy, make the copy durable, then drop the original.
        temporary = target.with_name(f".{target.name}.tmp")
        shutil.copyfile(source, temporary)
        with temporary.open("rb") as stream:
            os.fsync(stream.fileno())
        os.replace(temporary, target)
        source.unlink()
    sync_folder(target.parent)
    sync_folder(source.parent)
    return target


def is_no_space(exc: BaseException) -> bool:
    """Whether an exception says the disk (or the quota) is full."""
    return isinstance(exc, OSError) and exc.errno in NO_SPACE


class Disk:
    """The service's writes to the file system, and the space left in a folder."""

    def write_atomically(self, target: Path, data: bytes) -> None:
        write_atomically(target, data)

    def move_durably(self, source: Path, target: Path) -> Path:
        return move_durably(source, target)

    def free_bytes(self, folder: Path) -> int:
        return free_bytes(folder)


def free_bytes(folder: Path) -> int:
    """Bytes an unprivileged writer may still use on the file system of ``folder`` (or its nearest parent)."""
    while not folder.exists() and folder != folder.parent:
        folder = folder.parent
    stat = os.statvfs(folder)
    return stat.f_bavail * stat.f_frsize
