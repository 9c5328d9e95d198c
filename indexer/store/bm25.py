"""BM25 over the access classes a caller may read, exactly as FTS5's bm25() would score it.

FTS5's bm25() (SQLite docs, fts5.html, "The bm25() function"; ext/fts5/fts5_aux.c) is
score = Σ_phrases idf·(f·(k1+1)) / (f + k1·(1 − b + b·D/avgdl)), k1 = 1.2, b = 0.75,
idf = log((N − n + 0.5)/(n + 0.5)), at least 1e-6, where N is the number of rows, n the
rows holding the phrase, f its occurrences in the row, D the row's tokens and avgdl the
mean of D. Over one FTS5 table those statistics are the table's; here they are summed
over the classes the caller may read (N and the token total from each table's averages
record, n and f from its fts5vocab 'instance' table, D from its docsize table), so a
caller's scores are those of an index holding only what the caller can see. A caller of
one class gets FTS5's own bm25() (the reader's fast path); this computes the same
formula, in the same order of operations, for several.
"""

from __future__ import annotations

import sqlite3
import threading
from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from .lexstore import TOKENIZE, hits_table, table
from .sqlite import in_batches

K1, B = 1.2, 0.75  # FTS5's bm25() constants (fts5_aux.c)


def varints(blob: bytes) -> list[int]:
    """The SQLite varints of ``blob`` (big-endian 7 bits a byte, a 9th byte of 8 bits), as
    FTS5 writes its averages record and docsize rows (fts5_varint.c)."""
    out: list[int] = []
    i, n = 0, len(blob)
    while i < n:
        value = 0
        for j in range(9):
            byte = blob[i]
            i += 1
            if j == 8:
                value = (value << 8) | byte
                break
            value = (value << 7) | (byte & 0x7F)
            if byte < 0x80:
                break
        out.append(value)
    return out


@dataclass(frozen=True)
class ClassStats:
    """One access class: who may read it, its rows (chunks) and their tokens in all."""

    id: int
    groups: tuple[str, ...]
    rows: int
    tokens: int


def class_stats(conn: sqlite3.Connection, class_id: int, groups: tuple[str, ...]) -> ClassStats:
    """A class's N and token total, from its FTS5 averages record (``_data`` row 1)."""
    row = conn.execute(f"SELECT block FROM {table(class_id)}_data WHERE id = 1").fetchone()
    values = varints(bytes(row[0])) if row is not None and row[0] else []
    rows = values[0] if values else 0
    tokens = values[1] if len(values) > 1 else 0
    return ClassStats(class_id, groups, rows, tokens)


_tokenizer_lock = threading.Lock()
_tokenizer: sqlite3.Connection | None = None


@lru_cache(maxsize=4096)
def fts5_tokens(text: str) -> tuple[str, ...]:
    """The tokens FTS5 makes of ``text`` with the index's tokenizer, in order.

    Through a scratch FTS5 table in memory, so stemming, case folding, diacritics and
    separators are FTS5's own (unicode61 splits on '_', which Python's ``\\w`` keeps).
    """
    global _tokenizer
    with _tokenizer_lock:
        if _tokenizer is None:
            conn = sqlite3.connect(":memory:", check_same_thread=False)
            conn.execute(f"CREATE VIRTUAL TABLE t USING fts5(x, tokenize = '{TOKENIZE}')")
            conn.execute("CREATE VIRTUAL TABLE v USING fts5vocab(t, 'instance')")
            _tokenizer = conn
        _tokenizer.execute("DELETE FROM t")
        _tokenizer.execute("INSERT INTO t (rowid, x) VALUES (1, ?)", [text])
        rows = _tokenizer.execute('SELECT term FROM v ORDER BY "offset"').fetchall()
    return tuple(r[0] for r in rows)


def _phrase_hits(
    conn: sqlite3.Connection, class_id: int, tokens: tuple[str, ...]
) -> dict[int, int]:
    """Row id -> occurrences of the phrase ``tokens`` in one class's table."""
    hits = hits_table(class_id)
    if len(tokens) == 1:
        rows = conn.execute(
            f"SELECT doc, count(*) FROM {hits} WHERE term = ? GROUP BY doc", [tokens[0]]
        ).fetchall()
        return {int(r[0]): int(r[1]) for r in rows}
    # A phrase of several tokens occurs where its j-th token sits j places after its first.
    starts: np.ndarray | None = None
    for j, token in enumerate(tokens):
        rows = conn.execute(f'SELECT doc, "offset" FROM {hits} WHERE term = ?', [token]).fetchall()
        keys = np.fromiter(
            ((int(r[0]) << 32) + int(r[1]) - j for r in rows), dtype=np.int64, count=len(rows)
        )
        starts = keys if starts is None else np.intersect1d(starts, keys)
        if not len(starts):
            return {}
    assert starts is not None
    docs, counts = np.unique(starts >> 32, return_counts=True)
    return {int(d): int(c) for d, c in zip(docs, counts, strict=True)}


def _lengths(conn: sqlite3.Connection, class_id: int, ids: Sequence[int]) -> dict[int, int]:
    """Row id -> tokens of the row (its docsize entry; one column)."""
    out: dict[int, int] = {}
    for part, marks in in_batches(list(ids)):
        for r in conn.execute(
            f"SELECT id, sz FROM {table(class_id)}_docsize WHERE id IN ({marks})", part
        ):
            out[int(r[0])] = varints(bytes(r[1]))[0]
    return out


def score(
    conn: sqlite3.Connection,
    visible: Sequence[ClassStats],
    phrases: Sequence[tuple[str, ...]],
    k: int,
    admitted: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """BM25 over the rows of the ``visible`` classes as one collection: scores (higher is
    better, float32) and row ids, best first (ties by id), at most ``k``.

    ``phrases`` are the query's phrases as FTS5 tokens (an empty one matches nothing);
    ``admitted``, sorted ids, keeps only those rows (after the statistics are taken).
    """
    n_rows = sum(c.rows for c in visible)
    phrases = list(phrases)
    if n_rows == 0 or not any(phrases):
        return np.empty(0, np.float32), np.empty(0, np.int64)
    avgdl = float(sum(c.tokens for c in visible)) / float(n_rows)
    per_phrase: list[dict[int, int]] = []
    lengths: dict[int, int] = {}
    found: dict[tuple[str, ...], dict[int, int]] = {}
    for tokens in phrases:
        if tokens not in found:
            merged: dict[int, int] = {}
            for c in visible:
                if tokens and c.rows:
                    merged.update(_phrase_hits(conn, c.id, tokens))
            found[tokens] = merged
        per_phrase.append(found[tokens])
    ids = np.array(sorted(set().union(*per_phrase)), dtype=np.int64)
    if not len(ids):
        return np.empty(0, np.float32), np.empty(0, np.int64)
    for c in visible:
        if c.rows:
            lengths.update(_lengths(conn, c.id, ids.tolist()))
    D = np.array([lengths[int(i)] for i in ids], dtype=np.float64)
    total = np.zeros(len(ids), dtype=np.float64)
    for hits in per_phrase:
        n_hit = len(hits)
        idf = float(np.log((float(n_rows - n_hit) + 0.5) / (float(n_hit) + 0.5)))
        if idf <= 0.0:
            idf = 1e-6
        f = np.array([hits.get(int(i), 0) for i in ids], dtype=np.float64)
        # fts5_aux.c's expression, operation for operation, so one class scores as bm25().
        total = total + idf * ((f * (K1 + 1.0)) / (f + K1 * (1 - B + B * D / avgdl)))
    if admitted is not None:
        keep = np.isin(ids, admitted)
        ids, total = ids[keep], total[keep]
    order = np.lexsort((ids, -total))[: max(0, int(k))]
    return total[order].astype(np.float32), ids[order]
