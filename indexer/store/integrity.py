"""What ``sounding check`` needs to know of an index database, without changing it."""

from __future__ import annotations

import sqlite3
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from . import lexstore
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
    lexical_ids: np.ndarray  # every rowid of every class's FTS5 table (int64)
    lexical_misplaced: int  # lexical rows in another class's table than their document's
    lexical_broken: tuple[str, ...]  # class tables that are missing or cannot be read
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
        lexical, misplaced, broken = _lexical(conn)
        empty = conn.execute(f"SELECT count(*) {WITHOUT_CHUNKS}").fetchone()[0]
        docs = conn.execute("SELECT count(*) FROM documents").fetchone()[0]
        generation = state_generation(conn)
    finally:
        conn.close()
    return DatabaseReport(
        integrity=str(integrity),
        chunk_ids=ids,
        lexical_ids=lexical,
        lexical_misplaced=misplaced,
        lexical_broken=broken,
        wrong_size_vectors=int(wrong),
        documents=int(docs),
        documents_without_chunks=int(empty),
        generation=generation,
    )


def _lexical(conn: sqlite3.Connection) -> tuple[np.ndarray, int, tuple[str, ...]]:
    """Rowids of every class table, rows of the wrong class, and unreadable class tables."""
    parts: list[np.ndarray] = []
    misplaced = 0
    broken: list[str] = []
    for class_id, groups in conn.execute("SELECT id, groups FROM lexical_classes ORDER BY id"):
        fts = lexstore.table(class_id)
        try:
            conn.execute(f"SELECT 1 FROM {lexstore.hits_table(class_id)} LIMIT 1").fetchall()
            rows = conn.execute(f"SELECT rowid FROM {fts}").fetchall()
            misplaced += conn.execute(
                f"SELECT count(*) FROM {fts} f JOIN chunks c ON c.id = f.rowid "
                "JOIN documents d ON d.id = c.document_id WHERE d.groups != ?",
                [groups],
            ).fetchone()[0]
        except sqlite3.Error:
            broken.append(fts)
            continue
        parts.append(np.fromiter((r[0] for r in rows), dtype=np.int64, count=len(rows)))
    ids = np.concatenate(parts) if parts else np.empty(0, dtype=np.int64)
    return ids, int(misplaced), tuple(broken)
