"""The single-instance lock: one ``dlco-bridge watch`` per state folder.

Owns :class:`ServiceLock`, an OS lock on ``<state_dir>/service.lock``. It must not touch the
SQLite file: the lock guards the whole state folder, the ledger only its database.
"""

from __future__ import annotations

import fcntl
import os
from pathlib import Path
from typing import IO

from bridge.errors import LedgerError

LOCK_NAME = "service.lock"


class ServiceLock:
    """An OS lock on ``<state_dir>/service.lock``, held while the service runs.

    ``flock`` is released by the kernel when the process dies, even by kill -9, so a
    crashed service never leaves a stale lock behind.
    """

    def __init__(self, path: Path, handle: IO[str]) -> None:
        self.path = path
        self._handle = handle

    @classmethod
    def acquire(cls, state_dir: Path) -> ServiceLock:
        """Take the lock, or raise LedgerError when another service holds it."""
        path = state_dir / LOCK_NAME
        try:
            state_dir.mkdir(parents=True, exist_ok=True)
            handle = path.open("a+", encoding="ascii")
        except OSError as exc:
            raise LedgerError(f"cannot open {path}: {exc}") from exc
        try:
            fcntl.flock(handle.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            handle.close()
            raise LedgerError(f"another dlco-bridge service holds {path}") from exc
        # The pid is for the operator's eyes only; the lock is the flock itself.
        handle.truncate(0)
        handle.write(f"{os.getpid()}\n")
        handle.flush()
        return cls(path, handle)

    def release(self) -> None:
        if not self._handle.closed:
            fcntl.flock(self._handle.fileno(), fcntl.LOCK_UN)
            self._handle.close()

    def __enter__(self) -> ServiceLock:
        return self

    def __exit__(self, *exc: object) -> None:
        self.release()
