"""The lexical index on disk: one FTS5 table per access class, kept by the writer.

An access class is one distinct ``documents.groups`` value (``'[]'`` is everyone's).
Each class has an FTS5 table ``lexical_<id>`` (rowid = ``chunks.id``, one column
``body``) and an ``fts5vocab`` 'instance' table ``lexical_<id>_hits`` over it; the
table ``lexical_classes`` maps ids to groups. A search touches only the classes its
caller may read, so neither its scores (BM25's statistics are summed over those
classes, :mod:`.bm25`) nor its work depend on chunks the caller may not see.
"""

from __future__ import annotations

import json
import sqlite3
from collections.abc import Sequence

# Porter stemming over unicode61 words, so "restores" matches "restore".
TOKENIZE = "porter unicode61 remove_diacritics 2"


def table(class_id: int) -> str:
    """Name of the FTS5 table of one access class."""
    return f"lexical_{int(class_id)}"


def hits_table(class_id: int) -> str:
    """Name of the fts5vocab 'instance' table (term, doc, col, offset) of one class."""
    return f"lexical_{int(class_id)}_hits"


def lexical_body(title: str, trail: Sequence[str], text: str) -> str:
    """What the BM25 index holds for a chunk: the fields the encoder sees.

    A part equal to an earlier one is left out, so a title-only chunk (whose
    text is its title) does not count each word twice.
    """
    parts = [p for p in (title, " > ".join(trail), text) if p]
    return "\n".join(p for i, p in enumerate(parts) if p not in parts[:i])


def classes(conn: sqlite3.Connection) -> dict[int, tuple[str, ...]]:
    """Every access class: id -> groups (empty: everyone)."""
    rows = conn.execute("SELECT id, groups FROM lexical_classes ORDER BY id").fetchall()
    return {int(r[0]): tuple(json.loads(r[1])) for r in rows}


def class_of(conn: sqlite3.Connection, groups: str) -> int:
    """The id of the class of ``groups`` (a stored JSON list), made with its tables if new."""
    row = conn.execute("SELECT id FROM lexical_classes WHERE groups = ?", [groups]).fetchone()
    if row is not None:
        return int(row[0])
    class_id = int(
        conn.execute("INSERT INTO lexical_classes (groups) VALUES (?)", [groups]).lastrowid or 0
    )
    fts = table(class_id)
    conn.execute(f"CREATE VIRTUAL TABLE {fts} USING fts5(body, tokenize = '{TOKENIZE}')")
    conn.execute(
        f"CREATE VIRTUAL TABLE {hits_table(class_id)} "
        f"USING fts5vocab({table(class_id)}, 'instance')"
    )
    return class_id


def drop_class(conn: sqlite3.Connection, class_id: int) -> None:
    """Remove a class and its tables."""
    conn.execute(f"DROP TABLE IF EXISTS {hits_table(class_id)}")
    conn.execute(f"DROP TABLE IF EXISTS {table(class_id)}")
    conn.execute("DELETE FROM lexical_classes WHERE id = ?", [class_id])


def drop_all(conn: sqlite3.Connection) -> None:
    """Remove every class (and the lexical table of schema 2, ``chunks_fts``)."""
    for class_id in classes(conn):
        drop_class(conn, class_id)
    conn.execute("DROP TABLE IF EXISTS chunks_fts")


def add_chunks(conn: sqlite3.Connection, groups: str, rows: Sequence[tuple[int, str]]) -> None:
    """Index (chunk id, body) pairs in the class of ``groups``."""
    if rows:
        conn.executemany(
            f"INSERT INTO {table(class_of(conn, groups))} (rowid, body) VALUES (?, ?)", rows
        )


def drop_documents(conn: sqlite3.Connection, marks: str, ids: Sequence[str]) -> None:
    """Delete the lexical rows of the chunks of documents ``ids`` (``marks``: their ``?,?``),
    each from the table of its document's class."""
    found = conn.execute(
        f"SELECT DISTINCT l.id, d.groups FROM documents d JOIN lexical_classes l "
        f"ON l.groups = d.groups WHERE d.id IN ({marks})",
        list(ids),
    ).fetchall()
    for class_id, groups in found:
        conn.execute(
            f"DELETE FROM {table(class_id)} WHERE rowid IN (SELECT c.id FROM chunks c "
            f"JOIN documents d ON d.id = c.document_id WHERE d.id IN ({marks}) AND d.groups = ?)",
            [*ids, groups],
        )


def document_rows(
    conn: sqlite3.Connection, where: str, params: Sequence[object]
) -> list[tuple[str, int, str]]:
    """(groups, chunk id, body) of the chunks of the documents ``where`` selects (alias d)."""
    rows = conn.execute(
        "SELECT d.groups, c.id, d.title, c.trail, c.text FROM chunks c "
        f"JOIN documents d ON d.id = c.document_id WHERE {where} ORDER BY c.id",
        list(params),
    ).fetchall()
    return [(r[0], r[1], lexical_body(r[2], json.loads(r[3]), r[4])) for r in rows]


def index_rows(conn: sqlite3.Connection, rows: Sequence[tuple[str, int, str]]) -> None:
    """Index (groups, chunk id, body) rows, each in its class."""
    by_class: dict[str, list[tuple[int, str]]] = {}
    for groups, chunk_id, body in rows:
        by_class.setdefault(groups, []).append((chunk_id, body))
    for groups, part in by_class.items():
        add_chunks(conn, groups, part)


def rebuild(conn: sqlite3.Connection) -> int:
    """Drop every class and index every chunk anew; how many chunks were indexed."""
    drop_all(conn)
    rows = document_rows(conn, "1", [])
    index_rows(conn, rows)
    return len(rows)


def prune(conn: sqlite3.Connection) -> None:
    """Drop the classes no document belongs to any more."""
    for (class_id,) in conn.execute(
        "SELECT id FROM lexical_classes l WHERE NOT EXISTS "
        "(SELECT 1 FROM documents d WHERE d.groups = l.groups)"
    ).fetchall():
        drop_class(conn, int(class_id))
