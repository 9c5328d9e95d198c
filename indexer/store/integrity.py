"""What ``sounding check`` needs to know of an index database, without changing it."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .sqlite import chunk_ids, connect, state_generation

# Documents left without chunks: the index would call them unchanged forever.
WITHOUT_CHUNKS = (
    "FROM documents d WHERE NOT EXISTS (SELECT 1 FROM chunks c WHERE c.document_id = d.id)"
)


@dataclass(frozen=True)
class DatabaseReport:
    """The facts of one ``sounding.db`` that its derived files must agree with."""

    integrity: str  # SQLite's integrity check: "ok", or its first complaint
    chunk_ids: np.ndarray  # every chunk id (int64)
    lexical_ids: np.ndarray  # every rowid of the FTS5 index (int64)
    wrong_size_vectors: int  # chunk rows whose vector is not ``dimension`` float32s
    documents: int
    documents_without_chunks: int
    generation: int | None  # the committed generation; None before the first


def inspect_database(path: Path, dimension: int) -> DatabaseReport:
    """Read the facts of the database at ``path`` (opened read-only)."""
    conn = connect(path, readonly=True)
    try:
        integrity = conn.execute("PRAGMA integrity_check").fetchone()[0]
        ids = chunk_ids(conn)
        wrong = conn.execute(
            "SELECT count(*) FROM chunks WHERE length(vector) != ?", [4 * dimension]
        ).fetchone()[0]
        lexical = np.fromiter(
            (r[0] for r in conn.execute("SELECT rowid FROM chunks_fts")), dtype=np.int64
        )
        empty = conn.execute(f"SELECT count(*) {WITHOUT_CHUNKS}").fetchone()[0]
        docs = conn.execute("SELECT count(*) FROM documents").fetchone()[0]
        generation = state_generation(conn)
    finally:
        conn.close()
    return DatabaseReport(
        integrity=str(integrity),
        chunk_ids=ids,
        lexical_ids=lexical,
        wrong_size_vectors=int(wrong),
        documents=int(docs),
        documents_without_chunks=int(empty),
        generation=generation,
    )
