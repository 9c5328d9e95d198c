"""One writer at a time: an exclusive lock on the index folder.

The lock is an ``flock`` on ``<index>/.lock``; the kernel drops it when the
holding process dies, however it dies, so a lock left by a killed run is
taken over by the next one with no manual clean-up. The file also records
the holder's pid and start time, for the message a second run prints and to
tell that the previous holder died.
"""

from __future__ import annotations

import fcntl
import json
import os
import socket
import time
from pathlib import Path
from typing import Any, TextIO

from .errors import IndexLockedError, IndexStoreError
from .store.modes import FILE_MODE, owner_only_folder, tighten

LOCK_FILE = ".lock"


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class IndexLock:
    """Context manager holding the index folder's writer lock."""

    def __init__(self, index_dir: Path) -> None:
        self.path = Path(index_dir) / LOCK_FILE
        self._fh: TextIO | None = None
        self.took_over: dict[str, Any] | None = None

    def acquire(self) -> IndexLock:
        try:
            # The first thing a run touches: the folder is made (or tightened) owner-only here.
            owner_only_folder(self.path.parent)
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, FILE_MODE)
            tighten(self.path)
            fh = open(fd, "a+", encoding="utf-8")  # noqa: SIM115 - held until release()
        except OSError as exc:
            raise IndexStoreError(f"cannot create lock file {self.path}: {exc}") from exc
        try:
            fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            fh.seek(0)
            holder = _read(fh.read())
            fh.close()
            who = (
                f"pid {holder.get('pid')} on {holder.get('host')}, started "
                f"{time.strftime('%Y-%m-%d %H:%M:%S', time.localtime(holder.get('started', 0)))}"
                if holder
                else "another process"
            )
            raise IndexLockedError(
                f"index at {self.path.parent} is being updated by another `sounding index` "
                f"({who}); this run exits without changes. Try again when it has finished."
            ) from None
        fh.seek(0)
        previous = _read(fh.read())
        if (
            previous
            and previous.get("host") == socket.gethostname()
            and not _pid_alive(int(previous.get("pid", 0)))
        ):
            self.took_over = previous  # the last holder died mid-run
        fh.seek(0)
        fh.truncate()
        fh.write(
            json.dumps({"pid": os.getpid(), "host": socket.gethostname(), "started": time.time()})
        )
        fh.flush()
        self._fh = fh
        return self

    def release(self) -> None:
        if self._fh is not None:
            self._fh.seek(0)
            self._fh.truncate()
            fcntl.flock(self._fh.fileno(), fcntl.LOCK_UN)
            self._fh.close()
            self._fh = None

    def __enter__(self) -> IndexLock:
        return self if self._fh is not None else self.acquire()

    def __exit__(self, *exc: object) -> None:
        self.release()


def _read(text: str) -> dict[str, Any]:
    try:
        data = json.loads(text)
    except ValueError:
        return {}
    return data if isinstance(data, dict) else {}
