"""Read connections that all see one committed generation of an index database.

In WAL mode a connection inside a read transaction sees the database exactly
as it was when the transaction's first read ran, whatever commits meanwhile.
Several such connections, opened together and checked to see the same
generation, let concurrent requests read one generation in parallel instead
of queueing on a single connection. Same generation means same content: a
writer changes an index only in the transaction that also records the next
generation (``IndexWriter.publish``), so no commit leaves the number as it was.
"""

from __future__ import annotations

import queue
import sqlite3
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from ..errors import IndexStoreError
from .sqlite import connect, state_generation

# Openings tried when a commit lands between the first connection's snapshot and the last's.
ATTEMPTS = 10


def _open_snapshot(path: Path) -> tuple[sqlite3.Connection, int | None]:
    conn = connect(path, readonly=True)
    conn.isolation_level = None  # transactions are ours: BEGIN here, never committed
    conn.execute("BEGIN")
    try:
        # The first read fixes the snapshot.
        return conn, state_generation(conn)
    except BaseException:
        conn.close()
        raise


class SnapshotConnections:
    """``count`` read connections on one snapshot; each is lent to one thread at a time."""

    def __init__(self, path: Path, count: int = 1) -> None:
        if count < 1:
            raise ValueError(f"count={count} must be 1 or more")
        for _ in range(ATTEMPTS):
            opened: list[tuple[sqlite3.Connection, int | None]] = []
            try:
                for _ in range(count):
                    opened.append(_open_snapshot(path))
            except BaseException:
                for conn, _ in opened:
                    conn.close()
                raise
            if len({generation for _, generation in opened}) == 1:
                break
            for conn, _ in opened:  # a publication slipped in between: open them again
                conn.close()
        else:
            raise IndexStoreError(
                f"{path} changed {ATTEMPTS} times while its snapshot was being opened; "
                "try again when indexing is done"
            )
        self.generation: int | None = opened[0][1]
        self._all = [conn for conn, _ in opened]
        self._free: queue.LifoQueue[sqlite3.Connection] = queue.LifoQueue()
        for conn in self._all:
            self._free.put(conn)
        self._closed = False
        self._lock = threading.Lock()

    @property
    def count(self) -> int:
        return len(self._all)

    @contextmanager
    def connection(self) -> Iterator[sqlite3.Connection]:
        """A connection of the snapshot, the caller's alone for the block (waits for one)."""
        if self._closed:
            raise IndexStoreError("this index snapshot is closed")
        conn = self._free.get()
        try:
            yield conn
        finally:
            self._free.put(conn)

    def close(self) -> None:
        """Close every connection, ending the snapshot (callers must be done with it)."""
        with self._lock:
            if self._closed:
                return
            self._closed = True
        for conn in self._all:
            conn.close()
