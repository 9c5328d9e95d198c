"""SQLite access shared by the writer, the reader and the side databases.

Connections (read-only or read-write), the committed generation, chunk
vectors as blobs, and batching of long ``IN (...)`` lists.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import TypeVar

import numpy as np

from ..errors import IndexStoreError
from .modes import FOLDER_MODE, create_owner_only

# SQLite builds before 3.32 allow 999 host parameters a statement; stay below that.
IN_BATCH = 900

T = TypeVar("T")


def connect(path: Path, *, readonly: bool) -> sqlite3.Connection:
    """A connection to an index database: read-only, or read-write in WAL mode.

    The writer's is in autocommit mode (it opens its own transactions); rows
    come back as :class:`sqlite3.Row`. A read-write one creates (or tightens)
    the file and its -wal and -shm owner-only first: they hold document text.
    """
    if readonly:
        conn = sqlite3.connect(
            f"{path.resolve().as_uri()}?mode=ro", uri=True, check_same_thread=False
        )
    else:
        create_owner_only(path)
        conn = sqlite3.connect(path, isolation_level=None, check_same_thread=False)
        conn.execute("PRAGMA journal_mode=WAL")
        conn.execute("PRAGMA synchronous=NORMAL")
    conn.execute("PRAGMA foreign_keys=ON")
    conn.execute("PRAGMA busy_timeout=10000")
    conn.row_factory = sqlite3.Row
    return conn


def open_side_database(
    path: Path, schema: str, what: str, *, owner_only: bool = True
) -> sqlite3.Connection:
    """Open (creating) a small SQLite file kept beside an index: judgments, API keys.

    WAL mode, a busy timeout, ``schema`` applied. The file and its -wal and
    -shm are owner-only (they hold queries, restricted ids or keys): created
    so, or tightened when found looser (see :func:`.modes.create_owner_only`);
    ``owner_only=False`` is accepted for old callers and changes nothing.
    IndexStoreError naming ``what`` when it cannot be opened.
    """
    del owner_only  # always: nothing sounding keeps beside an index is for others
    try:
        path.parent.mkdir(parents=True, exist_ok=True, mode=FOLDER_MODE)
        create_owner_only(path)
        conn = sqlite3.connect(path, check_same_thread=False, isolation_level=None)
        conn.execute("PRAGMA journal_mode=WAL")
        conn.execute("PRAGMA busy_timeout=10000")
        conn.executescript(schema)
    except (OSError, sqlite3.Error) as exc:
        raise IndexStoreError(f"cannot open {what} {path}: {exc}") from exc
    return conn


def state_generation(conn: sqlite3.Connection) -> int | None:
    """The last committed generation, as SQLite records it (None before the first)."""
    row = conn.execute("SELECT value FROM state WHERE key = 'generation'").fetchone()
    return int(row[0]) if row else None


def in_batches(values: Sequence[T], size: int = IN_BATCH) -> Iterator[tuple[list[T], str]]:
    """``values`` in parts of at most ``size``, each with its ``?,?,...`` placeholders.

    For ``... IN ({marks})`` queries over more values than one statement may bind.
    """
    for start in range(0, len(values), size):
        part = list(values[start : start + size])
        yield part, ",".join("?" * len(part))


def vector_blob(vector: np.ndarray) -> bytes:
    """A chunk vector as stored in ``chunks.vector``: float32, native byte order."""
    return np.ascontiguousarray(vector, dtype=np.float32).tobytes()


def blob_vector(blob: bytes) -> np.ndarray:
    """A ``chunks.vector`` blob as a float32 vector (a read-only view of ``blob``)."""
    return np.frombuffer(blob, dtype=np.float32)


def load_vectors(
    conn: sqlite3.Connection, dimension: int, ids: Sequence[int] | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Ids and an (n, d) float32 matrix of chunk vectors, all (by id) or only ``ids``."""
    if ids is None:
        rows = conn.execute("SELECT id, vector FROM chunks ORDER BY id").fetchall()
    else:
        rows = []
        for part, marks in in_batches([int(i) for i in ids]):
            rows += conn.execute(
                f"SELECT id, vector FROM chunks WHERE id IN ({marks})", part
            ).fetchall()
    out_ids = np.fromiter((r[0] for r in rows), dtype=np.int64, count=len(rows))
    matrix = np.empty((len(rows), dimension), dtype=np.float32)
    for i, r in enumerate(rows):
        matrix[i] = blob_vector(r[1])
    return out_ids, matrix


def chunk_ids(conn: sqlite3.Connection) -> np.ndarray:
    """Every stored chunk id (int64, in SQLite's order)."""
    return np.fromiter((r[0] for r in conn.execute("SELECT id FROM chunks")), dtype=np.int64)
