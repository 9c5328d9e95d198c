"""The reader that serves one index generation (records in :mod:`.records`)."""

from __future__ import annotations

import sqlite3
import threading
from collections.abc import Iterable, Iterator, Sequence
from contextlib import contextmanager
from functools import cached_property
from pathlib import Path
from typing import Any

import faiss
import numpy as np

from ..access import may_read
from ..errors import IndexCorruptError
from ..lexical import fts5_match
from ..selection import SearchFilter
from ..vectorfile import load_or_rebuild
from ..vectors import search_vectors
from . import lexstore
from .bm25 import ClassStats, class_stats, fts5_tokens, score
from .format import DATABASE, Manifest, check_model, vectors_filename
from .records import (
    CHUNK_COLUMNS,
    HIT_COLUMNS,
    ChunkRecord,
    DocumentRecord,
    HitRow,
    chunk_record,
    document_record,
    hit_row,
)
from .snapshot import SnapshotConnections
from .sqlite import connect, in_batches, load_vectors, state_generation

__all__ = ["ChunkRecord", "DocumentRecord", "HitRow", "IndexReader"]

# Filters whose admitted chunk ids a reader keeps (one entry per distinct groups + filter),
# and the most ids all entries may hold together: a FAISS IDSelectorBatch costs tens of
# bytes per id, and filters with a time in them can be all different.
FILTER_CACHE = 64
FILTER_CACHE_IDS = 2_000_000


class IndexReader:
    """Read-only view of one index generation: vectors in memory, rows from SQLite.

    Safe to share between threads: FAISS searches are read-only; SQLite is
    read through per-thread connections, or, when ``pinned``, through
    ``connections`` connections that each hold a read transaction on the one
    snapshot taken when the reader was made (:mod:`.snapshot`). SQLite's WAL
    mode then shows them the database exactly as it was, whatever a re-index
    commits meanwhile, so a long-lived reader (the service's) answers every
    request from one complete generation, up to ``connections`` requests at once.
    (A run commits once, when it publishes, so every snapshot is a whole generation.)
    """

    def __init__(
        self,
        index_dir: Path,
        model: dict[str, Any] | None = None,
        *,
        pinned: bool = False,
        connections: int = 1,
    ) -> None:
        self.index_dir = Path(index_dir)
        self.manifest = Manifest.read(self.index_dir)
        if model is not None:
            check_model(self.manifest, model, self.index_dir)
        self.dimension = int(self.manifest.model["dimension"])
        self._db_path = self.index_dir / DATABASE
        if not self._db_path.is_file():
            raise IndexCorruptError(
                f"index at {self.index_dir} has a manifest but no {DATABASE}; "
                "rebuild it with `sounding index --rebuild`"
            )
        self._local = threading.local()
        self._allowed: dict[tuple[Any, ...], tuple[np.ndarray, faiss.IDSelector]] = {}
        self._counts: dict[tuple[Any, ...], tuple[int, int]] = {}
        self._cache_lock = threading.Lock()
        self._pinned = SnapshotConnections(self._db_path, connections) if pinned else None
        # SQLite's commit makes a generation exist; the manifest may lag behind it
        # by a crash between the two, so the generation comes from the database.
        with self._connection() as conn:
            committed = state_generation(conn)
        self._generation = committed if committed is not None else self.manifest.generation
        vectors = self.index_dir / vectors_filename(self._generation)
        # A missing or unreadable vector file is derived data: rebuilt in memory, of the
        # kind (and nprobe) the manifest records.
        self.faiss_index: faiss.Index = load_or_rebuild(
            vectors, self.manifest.vectors, self.dimension, self.chunk_vectors
        )
        if self.faiss_index.d != self.dimension:
            raise IndexCorruptError(
                f"{vectors} has {self.faiss_index.d} dimensions, the manifest says "
                f"{self.dimension}; "
                "rebuild the index with `sounding index --rebuild`"
            )

    @contextmanager
    def _connection(self) -> Iterator[sqlite3.Connection]:
        """The connection to read with: this thread's, or one of the snapshot's (the
        caller's alone for the block) when pinned."""
        if self._pinned is not None:
            with self._pinned.connection() as conn:
                yield conn
            return
        local: sqlite3.Connection | None = getattr(self._local, "conn", None)
        if local is None:
            local = connect(self._db_path, readonly=True)
            self._local.conn = local
        yield local

    def _rows(self, sql: str, params: Sequence[object] = ()) -> list[sqlite3.Row]:
        with self._connection() as conn:
            return conn.execute(sql, list(params)).fetchall()

    def chunk_vectors(self, ids: Sequence[int] | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Stored vectors: chunk ids and an (n, d) float32 matrix, all (by id) or only ``ids``
        (in no particular order; ids no longer stored are left out)."""
        with self._connection() as conn:
            return load_vectors(conn, self.dimension, ids)

    def cached_filter_sizes(self) -> list[int]:
        """How many chunk ids each cached filter holds, least recently used first."""
        with self._cache_lock:
            return [len(ids) for ids, _ in self._allowed.values()]

    def chunk_documents(self) -> dict[int, str]:
        """Chunk id -> document id for every chunk."""
        return {int(r[0]): r[1] for r in self._rows("SELECT id, document_id FROM chunks")}

    @property
    def generation(self) -> int:
        """The generation this reader sees."""
        return self._generation

    def counts(self) -> tuple[int, int]:
        """(documents, chunks) in this generation."""
        docs = self._rows("SELECT count(*) FROM documents")[0][0]
        return int(docs), int(self.faiss_index.ntotal)

    def nearest(
        self,
        queries: np.ndarray,
        k: int,
        *,
        selector: faiss.IDSelector | None = None,
        allowed: int | None = None,
    ) -> tuple[np.ndarray, np.ndarray]:
        """The ``k`` chunks nearest each query vector (FAISS, inner product): ``D`` scores
        and ``I`` chunk ids, shape (m, k); -1 pads.

        With ``selector`` only the chunk ids it selects are ranked; ``allowed``,
        how many that is, lets an IVF index probe more cells for a narrow one.
        """
        queries = np.ascontiguousarray(queries, dtype=np.float32)
        if queries.ndim != 2 or queries.shape[1] != self.dimension:
            raise ValueError(f"queries must have shape (m, {self.dimension})")
        k = max(1, min(k, int(self.faiss_index.ntotal) or 1))
        return search_vectors(self.faiss_index, queries, k, selector=selector, allowed=allowed)

    @cached_property
    def lexical_classes(self) -> list[ClassStats]:
        """The access classes of this generation that hold chunks, with their statistics."""
        with self._connection() as conn:
            found = [class_stats(conn, i, g) for i, g in lexstore.classes(conn).items()]
        return [c for c in found if c.rows]

    def visible_classes(self, where: SearchFilter | None) -> list[ClassStats]:
        """The classes whose chunks ``where``'s caller may read (None: every class)."""
        groups = None if where is None else where.groups
        return [c for c in self.lexical_classes if may_read(c.groups, groups)]

    def bm25(
        self, terms: Sequence[str], k: int, where: SearchFilter | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        """BM25 ranking of the chunks for any of ``terms``: scores (higher is better) and
        chunk ids, best first.

        Only the access classes ``where``'s caller may read are touched, and BM25's
        statistics are theirs (:mod:`.bm25`): what a caller may not see changes neither
        the scores nor the work. ``where``'s other conditions apply before the top ``k``.
        With a single class this is FTS5's own bm25() over its table.
        """
        visible = self.visible_classes(where)
        if not terms or not visible:
            return np.empty(0, np.float32), np.empty(0, np.int64)
        if len(visible) > 1:
            phrases = [fts5_tokens(t) for t in terms]
            admitted = self.allowed_chunks(where) if where is not None and where.narrows else None
            with self._connection() as conn:
                return score(conn, visible, phrases, k, admitted)
        fts = lexstore.table(visible[0].id)
        match = fts5_match(terms)
        if where is None or not where.narrows:
            rows = self._rows(
                f"SELECT rowid, bm25({fts}) FROM {fts} WHERE {fts} MATCH ? "
                f"ORDER BY bm25({fts}) LIMIT ?",
                [match, int(k)],
            )
        else:
            cond, params = where.sql()
            rows = self._rows(
                f"SELECT f.rowid, bm25({fts}) FROM {fts} f "
                "JOIN chunks c ON c.id = f.rowid JOIN documents d ON d.id = c.document_id "
                f"WHERE {fts} MATCH ? AND {cond} ORDER BY bm25({fts}) LIMIT ?",
                [match, *params, int(k)],
            )
        # FTS5's bm25() is negative, more negative is better; flip it for callers.
        scores = np.fromiter((-r[1] for r in rows), dtype=np.float32, count=len(rows))
        ids = np.fromiter((r[0] for r in rows), dtype=np.int64, count=len(rows))
        return scores, ids

    def readable_chunks(self, where: SearchFilter | None) -> int:
        """How many chunks ``where``'s caller may read, whatever else it narrows."""
        if where is None or where.groups is None or not self.restricted:
            return int(self.faiss_index.ntotal)
        return self.visible_counts(SearchFilter(groups=where.groups))[1]

    @cached_property
    def restricted(self) -> bool:
        """Whether any document of this generation is readable by some groups only."""
        return bool(self._rows("SELECT 1 FROM documents WHERE groups != '[]' LIMIT 1"))

    def _restricts(self, where: SearchFilter) -> bool:
        """Whether ``where`` leaves out any chunk of this generation (it may not, when it only
        names the caller's groups and no document is restricted)."""
        return where.narrows or (where.groups is not None and self.restricted)

    def admitted(self, where: SearchFilter | None) -> tuple[np.ndarray, faiss.IDSelector] | None:
        """Sorted chunk ids ``where`` admits and a FAISS selector of them; None for all.

        Cached per filter for the life of this reader (one generation).
        """
        if where is None or not self._restricts(where):
            return None
        key = where.key
        with self._cache_lock:
            entry = self._allowed.pop(key, None)
            if entry is not None:
                self._allowed[key] = entry  # most recently used last
                return entry
        cond, params = where.sql()
        rows = self._rows(
            f"SELECT c.id FROM chunks c JOIN documents d ON d.id = c.document_id WHERE {cond} "
            "ORDER BY c.id",
            params,
        )
        ids = np.ascontiguousarray(
            np.fromiter((r[0] for r in rows), dtype=np.int64, count=len(rows))
        )
        # FAISS copies the ids into the selector.
        entry = (ids, faiss.IDSelectorBatch(len(ids), faiss.swig_ptr(ids)))
        with self._cache_lock:
            self._allowed[key] = entry
            held = sum(len(e[0]) for e in self._allowed.values())
            while len(self._allowed) > 1 and (
                len(self._allowed) > FILTER_CACHE or held > FILTER_CACHE_IDS
            ):
                held -= len(self._allowed.pop(next(iter(self._allowed)))[0])
        return entry

    def allowed_chunks(self, where: SearchFilter | None) -> np.ndarray | None:
        """Sorted ids of the chunks ``where`` admits; None when it admits every chunk."""
        entry = self.admitted(where)
        return None if entry is None else entry[0]

    def selector(self, where: SearchFilter | None) -> faiss.IDSelector | None:
        """A FAISS id selector of the chunks ``where`` admits; None when all are."""
        entry = self.admitted(where)
        return None if entry is None else entry[1]

    def visible_counts(self, where: SearchFilter) -> tuple[int, int]:
        """(documents, chunks) that ``where`` admits; cached for this generation (the
        unauthenticated /health asks on every probe)."""
        with self._cache_lock:
            cached = self._counts.get(where.key)
        if cached is not None:
            return cached
        cond, params = where.sql()
        docs = self._rows(f"SELECT count(*) FROM documents d WHERE {cond}", params)[0][0]
        chunks = self._rows(
            f"SELECT count(*) FROM chunks c JOIN documents d ON d.id = c.document_id WHERE {cond}",
            params,
        )[0][0]
        counts = (int(docs), int(chunks))
        with self._cache_lock:
            if len(self._counts) >= FILTER_CACHE:
                self._counts.pop(next(iter(self._counts)))
            self._counts[where.key] = counts
        return counts

    def collections(self, where: SearchFilter) -> list[tuple[str, int]]:
        """(collection, documents) pairs of the documents ``where`` admits, by name."""
        cond, params = where.sql()
        rows = self._rows(
            f"SELECT d.collection, count(*) FROM documents d WHERE {cond} "
            "GROUP BY d.collection ORDER BY d.collection",
            params,
        )
        return [(r[0], int(r[1])) for r in rows]

    def chunks(self, ids: Sequence[int]) -> dict[int, ChunkRecord]:
        """Chunk records by id; ids no longer stored are left out."""
        out: dict[int, ChunkRecord] = {}
        ids = [int(i) for i in ids if i >= 0]
        for part, marks in in_batches(ids):
            for row in self._rows(
                f"SELECT {CHUNK_COLUMNS} FROM chunks WHERE id IN ({marks})", part
            ):
                out[row["id"]] = chunk_record(row)
        return out

    def documents(
        self, ids: Iterable[str], where: SearchFilter | None = None
    ) -> dict[str, DocumentRecord]:
        """Document records by id; unknown ids, and those ``where`` does not admit, are
        left out alike (the condition is in the one query, so both take the same path)."""
        cond, params = where.sql() if where is not None else ("1", [])
        out: dict[str, DocumentRecord] = {}
        ids = list(dict.fromkeys(ids))
        for part, marks in in_batches(ids):
            for row in self._rows(
                f"SELECT * FROM documents d WHERE d.id IN ({marks}) AND {cond}", [*part, *params]
            ):
                out[row["id"]] = document_record(row)
        return out

    def hit_rows(self, ids: Sequence[int], where: SearchFilter | None = None) -> dict[int, HitRow]:
        """What ranked passages show, by chunk id, from one join of chunks and documents.

        Ids no longer stored are left out, and so are chunks of documents that
        ``where`` does not admit: the rankings are filtered already; this is
        the second check, in the same SQL rule.
        """
        cond, params = where.sql() if where is not None else ("1", [])
        out: dict[int, HitRow] = {}
        for part, marks in in_batches([int(i) for i in ids if i >= 0]):
            for row in self._rows(
                f"SELECT {HIT_COLUMNS} FROM chunks c JOIN documents d ON d.id = c.document_id "
                f"WHERE c.id IN ({marks}) AND {cond}",
                [*part, *params],
            ):
                hit = hit_row(row)
                out[hit.chunk_id] = hit
        return out

    def ordinal_rows(
        self, document_id: str, first: int, last: int, where: SearchFilter | None = None
    ) -> list[HitRow]:
        """A document's chunks with ordinals ``first``..``last`` in order, as hit rows (the
        windows that follow a ranked passage, for grounding); empty when ``where`` does
        not admit the document."""
        cond, params = where.sql() if where is not None else ("1", [])
        rows = self._rows(
            f"SELECT {HIT_COLUMNS} FROM chunks c JOIN documents d ON d.id = c.document_id "
            f"WHERE c.document_id = ? AND c.ordinal BETWEEN ? AND ? AND {cond} "
            "ORDER BY c.ordinal",
            [document_id, first, last, *params],
        )
        return [hit_row(r) for r in rows]

    def document(
        self, document_id: str, where: SearchFilter | None = None
    ) -> DocumentRecord | None:
        """One document's record; None when it is not stored or ``where`` does not admit it."""
        return self.documents([document_id], where).get(document_id)

    def document_chunks(self, document_id: str) -> list[ChunkRecord]:
        """A document's chunks in order; empty when it is not stored."""
        rows = self._rows(
            f"SELECT {CHUNK_COLUMNS} FROM chunks WHERE document_id = ? ORDER BY ordinal",
            [document_id],
        )
        return [chunk_record(r) for r in rows]

    def close(self) -> None:
        """Close this thread's connection; a pinned reader closes its snapshot for good."""
        conn = getattr(self._local, "conn", None)
        if conn is not None:
            conn.close()
            self._local.conn = None
        if self._pinned is not None:
            self._pinned.close()

    def __del__(self) -> None:
        # A snapshot holds back WAL checkpoints; owners close readers explicitly (the
        # service's generations do), this only catches a reader nobody closed.
        pinned = getattr(self, "_pinned", None)
        if pinned is not None:
            pinned.close()
