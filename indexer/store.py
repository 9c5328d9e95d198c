"""The on-disk index: its layout, the writer that changes it and the reader that serves it.

Layout of an index folder (``SCHEMA_VERSION`` below)::

    manifest.json          what built the index and which generation is current
    last-run.json          outcome of the last indexing run (for monitoring)
    sounding.db            SQLite: documents, chunks (text, metadata and vector),
                           chunks_fts (FTS5, BM25 over title + trail + text)
    vectors-<gen>.faiss    FAISS index over the chunk vectors, keyed by the chunk
                           ids SQLite assigns: exact (IndexIDMap2(IndexFlatIP)) or,
                           for large collections, IVF,SQ8 (see indexer/vectors.py);
                           the manifest's ``vectors`` entry names kind and parameters

SQLite is the source of truth: every chunk row keeps its float32 vector, so
the FAISS file is derived data that a writer (or a reader, in memory) can
always rebuild. Chunk ids come from ``AUTOINCREMENT`` and are never reused,
so a FAISS file one generation behind can only point at rows that are gone,
never at the wrong row.
"""

from __future__ import annotations

import json
import os
import sqlite3
import threading
import time
from collections.abc import Iterable, Iterator, Sequence
from contextlib import contextmanager, suppress
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

import faiss
import numpy as np
import sqlite_utils

from .access import dump
from .chunking import Chunk, ChunkSettings
from .documents import Document
from .errors import IndexCorruptError, IndexMismatchError, IndexMissingError, IndexStoreError
from .selection import SearchFilter
from .vectors import (
    DEFAULT_CHOICE,
    EXACT,
    KINDS,
    VectorChoice,
    VectorPlan,
    build_vectors,
    describe_vectors,
    index_ids,
    needs_rebuild,
    plan_vectors,
    search_vectors,
)

SCHEMA_VERSION = 2
# Filters whose admitted chunk ids a reader keeps (one entry per distinct groups + filter),
# and the most ids all entries may hold together: a FAISS IDSelectorBatch costs tens of
# bytes per id, and filters with a time in them can be all different.
_FILTER_CACHE = 64
_FILTER_CACHE_IDS = 2_000_000
FORMAT = "sounding-index"
MANIFEST = "manifest.json"
DATABASE = "sounding.db"
LAST_RUN = "last-run.json"

_SCHEMA = """
CREATE TABLE IF NOT EXISTS documents (
    id TEXT PRIMARY KEY,
    collection TEXT NOT NULL,
    title TEXT NOT NULL,
    source TEXT NOT NULL,
    kind TEXT NOT NULL,
    modified REAL NOT NULL,
    content_hash TEXT NOT NULL,
    metadata TEXT NOT NULL DEFAULT '{}',
    indexed_at REAL NOT NULL,
    -- JSON lists: who may read it ([] = everyone), and tags for filtering.
    groups TEXT NOT NULL DEFAULT '[]',
    tags TEXT NOT NULL DEFAULT '[]'
);
CREATE INDEX IF NOT EXISTS documents_collection ON documents(collection);
CREATE TABLE IF NOT EXISTS chunks (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    document_id TEXT NOT NULL REFERENCES documents(id) ON DELETE CASCADE,
    ordinal INTEGER NOT NULL,
    trail TEXT NOT NULL,
    text TEXT NOT NULL,
    page INTEGER,
    tokens INTEGER NOT NULL,
    embed_hash TEXT NOT NULL,
    vector BLOB NOT NULL,
    UNIQUE (document_id, ordinal)
);
CREATE INDEX IF NOT EXISTS chunks_document ON chunks(document_id);
CREATE TABLE IF NOT EXISTS state (key TEXT PRIMARY KEY, value TEXT NOT NULL);
-- BM25 over each chunk's title, heading trail and text; rowid = chunks.id.
-- Porter stemming over unicode61 words, so "restores" matches "restore".
CREATE VIRTUAL TABLE IF NOT EXISTS chunks_fts USING fts5(
    body, tokenize = 'porter unicode61 remove_diacritics 2'
);
"""


def vectors_filename(generation: int) -> str:
    """Name of the FAISS file of one generation."""
    return f"vectors-{generation}.faiss"


@dataclass(frozen=True)
class Manifest:
    """What built an index; ``manifest.json`` on disk."""

    model: dict[str, Any]
    chunking: dict[str, int]
    generation: int = 0
    documents: int = 0
    chunks: int = 0
    updated_at: float = 0.0
    schema_version: int = SCHEMA_VERSION
    # Kind and parameters of the FAISS index (indexer/vectors.py); absent means exact.
    vectors: dict[str, Any] = field(default_factory=lambda: {"kind": EXACT})

    @property
    def vectors_file(self) -> str:
        return vectors_filename(self.generation)

    def to_json(self) -> dict[str, Any]:
        return {
            "format": FORMAT,
            "schema_version": self.schema_version,
            "generation": self.generation,
            "vectors_file": self.vectors_file,
            "model": self.model,
            "chunking": self.chunking,
            "documents": self.documents,
            "chunks": self.chunks,
            "updated_at": self.updated_at,
            "vectors": self.vectors,
        }

    @classmethod
    def read(cls, index_dir: Path) -> Manifest:
        """Read the manifest of ``index_dir``; IndexMissingError if there is none."""
        path = index_dir / MANIFEST
        if not path.is_file():
            raise IndexMissingError(
                f"no index at {index_dir} (no {MANIFEST}); build one with "
                f"`sounding index PATH --index {index_dir}`"
            )
        try:
            data = json.loads(path.read_text("utf-8"))
        except (OSError, ValueError) as exc:
            raise IndexCorruptError(f"cannot read {path}: {exc}") from exc
        if data.get("format") != FORMAT:
            raise IndexCorruptError(f"{path} is not a sounding index manifest")
        if data.get("schema_version") != SCHEMA_VERSION:
            raise IndexMismatchError(
                f"index at {index_dir} has schema version {data.get('schema_version')}, this "
                f"sounding reads version {SCHEMA_VERSION}; "
                "rebuild it with `sounding index --rebuild`"
            )
        return cls(
            model=data["model"],
            chunking=data["chunking"],
            generation=int(data["generation"]),
            documents=int(data.get("documents", 0)),
            chunks=int(data.get("chunks", 0)),
            updated_at=float(data.get("updated_at", 0.0)),
            vectors=VectorPlan.from_json(data.get("vectors")).to_json(),
        )

    def write(self, index_dir: Path) -> None:
        """Write atomically: a reader sees the old manifest or the new one, never half."""
        _atomic_write(index_dir / MANIFEST, json.dumps(self.to_json(), indent=2).encode())


def _atomic_write(path: Path, data: bytes) -> None:
    tmp = path.with_name(f".{path.name}.tmp")
    with open(tmp, "wb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)


def write_last_run(index_dir: Path, result: str, detail: str = "", **extra: Any) -> None:
    """Record the outcome of an indexing run (``ok`` or ``failed``) for monitoring.

    Best effort: a full disk that made the run fail may make this fail too,
    and that must not hide the run's own error.
    """
    record = {"finished_at": time.time(), "result": result, "detail": detail, **extra}
    with suppress(OSError):
        _atomic_write(Path(index_dir) / LAST_RUN, json.dumps(record).encode())


def read_last_run(index_dir: Path) -> dict[str, Any] | None:
    """The last run's record (``finished_at``, ``result``, ``detail``), or None."""
    try:
        data = json.loads((Path(index_dir) / LAST_RUN).read_text("utf-8"))
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) else None


def open_side_database(
    path: Path, schema: str, what: str, *, owner_only: bool = False
) -> sqlite3.Connection:
    """Open (creating) a small SQLite file kept beside an index: judgments, API keys.

    WAL mode, a busy timeout, ``schema`` applied; ``owner_only`` creates the
    file readable by its owner only before SQLite opens it (SQLite gives its
    -wal and -shm files the database file's permissions: SQLite unix VFS,
    robustFchown and findCreateFileMode in os_unix.c). IndexStoreError naming
    ``what`` when it cannot be opened.
    """
    try:
        path.parent.mkdir(parents=True, exist_ok=True, mode=0o700)
        if owner_only:
            os.close(os.open(path, os.O_RDWR | os.O_CREAT, 0o600))
            if path.stat().st_mode & 0o077:
                os.chmod(path, 0o600)
        conn = sqlite3.connect(path, check_same_thread=False, isolation_level=None)
        conn.execute("PRAGMA journal_mode=WAL")
        conn.execute("PRAGMA busy_timeout=10000")
        conn.executescript(schema)
    except (OSError, sqlite3.Error) as exc:
        raise IndexStoreError(f"cannot open {what} {path}: {exc}") from exc
    return conn


def check_model(manifest: Manifest, model: dict[str, Any], index_dir: Path) -> None:
    """Raise IndexMismatchError unless ``model`` is the encoder that built the index."""
    built = manifest.model
    if (
        built.get("dimension") != model["dimension"]
        or built.get("fingerprint") != model["fingerprint"]
    ):
        raise IndexMismatchError(
            f"index at {index_dir} was built with model '{built.get('name')}' "
            f"({built.get('dimension')} dimensions, fingerprint {built.get('fingerprint')}) "
            f"but the configured model is '{model['name']}' ({model['dimension']} dimensions, "
            f"fingerprint {model['fingerprint']}); set SOUNDING_MODEL_PATH to the model that "
            "built it, or rebuild with `sounding index --rebuild`"
        )


def check_chunking(manifest: Manifest, chunking: ChunkSettings, index_dir: Path) -> None:
    """Raise IndexMismatchError unless the index was cut with ``chunking``."""
    want = {"max_tokens": chunking.max_tokens, "overlap": chunking.overlap}
    if manifest.chunking != want:
        raise IndexMismatchError(
            f"index at {index_dir} was chunked with chunk_tokens="
            f"{manifest.chunking.get('max_tokens')}, "
            f"chunk_overlap={manifest.chunking.get('overlap')}"
            f" but the settings say chunk_tokens={chunking.max_tokens}, chunk_overlap="
            f"{chunking.overlap}; re-chunk everything with `sounding index --rebuild` or use "
            "another --index folder"
        )


def _connect(path: Path, *, readonly: bool) -> sqlite3.Connection:
    if readonly:
        conn = sqlite3.connect(
            f"{path.resolve().as_uri()}?mode=ro", uri=True, check_same_thread=False
        )
    else:
        conn = sqlite3.connect(path, isolation_level=None, check_same_thread=False)
        conn.execute("PRAGMA journal_mode=WAL")
        conn.execute("PRAGMA synchronous=NORMAL")
    conn.execute("PRAGMA foreign_keys=ON")
    conn.execute("PRAGMA busy_timeout=10000")
    conn.row_factory = sqlite3.Row
    return conn


def lexical_body(title: str, trail: Sequence[str], text: str) -> str:
    """What the BM25 index holds for a chunk: the fields the encoder sees.

    A part equal to an earlier one is left out, so a title-only chunk (whose
    text is its title) does not count each word twice.
    """
    parts = [p for p in (title, " > ".join(trail), text) if p]
    return "\n".join(p for i, p in enumerate(parts) if p not in parts[:i])


def _state_generation(conn: sqlite3.Connection) -> int | None:
    """The last committed generation, as SQLite records it (None before the first)."""
    row = conn.execute("SELECT value FROM state WHERE key = 'generation'").fetchone()
    return int(row[0]) if row else None


def _vector_blob(vector: np.ndarray) -> bytes:
    return np.ascontiguousarray(vector, dtype=np.float32).tobytes()


def _load_vectors(conn: sqlite3.Connection, dimension: int, ids: Sequence[int] | None = None):
    """Ids and an (n, d) float32 matrix of chunk vectors, all or only ``ids``."""
    if ids is None:
        rows = conn.execute("SELECT id, vector FROM chunks ORDER BY id").fetchall()
    else:
        rows = []
        for start in range(0, len(ids), 900):
            part = list(ids[start : start + 900])
            marks = ",".join("?" * len(part))
            rows += conn.execute(
                f"SELECT id, vector FROM chunks WHERE id IN ({marks})", part
            ).fetchall()
    out_ids = np.fromiter((r[0] for r in rows), dtype=np.int64, count=len(rows))
    matrix = np.empty((len(rows), dimension), dtype=np.float32)
    for i, r in enumerate(rows):
        matrix[i] = np.frombuffer(r[1], dtype=np.float32)
    return out_ids, matrix


class IndexWriter:
    """Changes an index folder; only the indexer uses it.

    The whole run is one SQLite transaction (documents changed through
    savepoints inside it); :meth:`publish` writes the next FAISS file, commits,
    then replaces the manifest. A run that dies before its commit leaves the
    last generation exactly as it was.
    """

    def __init__(
        self,
        index_dir: Path,
        model: dict[str, Any],
        chunking: ChunkSettings,
        *,
        rebuild: bool = False,
        vectors: VectorChoice = DEFAULT_CHOICE,
    ) -> None:
        self.index_dir = Path(index_dir)
        self.vector_choice = vectors
        try:
            # The index holds document text: readable by its owner only.
            self.index_dir.mkdir(parents=True, exist_ok=True, mode=0o700)
        except OSError as exc:
            raise IndexStoreError(f"cannot create index folder {self.index_dir}: {exc}") from exc
        self.model = model
        self.chunking = chunking
        self.dimension = int(model["dimension"])
        other_schema = False
        try:
            previous: Manifest | None = Manifest.read(self.index_dir)
        except IndexMissingError:
            previous = None
        except IndexMismatchError:
            if not rebuild:
                raise
            previous, other_schema = None, True
        if previous is not None and not rebuild:
            check_model(previous, model, self.index_dir)
            check_chunking(previous, chunking, self.index_dir)
        self.previous = previous
        # Leftovers of a run that died while writing: never part of any generation.
        for leftover in self.index_dir.glob(".*.tmp"):
            leftover.unlink(missing_ok=True)
        db_path = self.index_dir / DATABASE
        if other_schema and db_path.exists():
            # Tables of another schema cannot be reused; start the file anew.
            for suffix in ("", "-wal", "-shm"):
                Path(f"{db_path}{suffix}").unlink(missing_ok=True)
        try:
            self.conn = _connect(db_path, readonly=False)
            self.conn.executescript(_SCHEMA)
            # The whole run is one transaction, committed by publish(): a run that
            # dies, however it dies, leaves the last published generation as it was.
            self.conn.execute("BEGIN IMMEDIATE")
            self._roll_forward()
            if rebuild:
                self.conn.execute("DELETE FROM chunks_fts")
                self.conn.execute("DELETE FROM documents")  # chunks go by cascade
        except sqlite3.OperationalError as exc:
            raise IndexStoreError(f"cannot open {db_path} for writing: {exc}") from exc
        except sqlite3.Error as exc:
            raise IndexStoreError(f"cannot open {db_path}: {exc}") from exc
        self.db = sqlite_utils.Database(self.conn)

    def _roll_forward(self) -> None:
        """Finish a publication that committed but died before replacing the manifest."""
        committed = _state_generation(self.conn)
        if self.previous is None or committed is None or committed <= self.previous.generation:
            return
        path = self.index_dir / vectors_filename(committed)
        if path.is_file():
            docs = self.conn.execute("SELECT count(*) FROM documents").fetchone()[0]
            chunks = self.conn.execute("SELECT count(*) FROM chunks").fetchone()[0]
            try:  # the committed file says what it is (an IVF's lists mapped, not read)
                described = describe_vectors(faiss.read_index(str(path), faiss.IO_FLAG_MMAP))
            except RuntimeError:
                described = self.previous.vectors  # unreadable: the next publish rebuilds it
            self.previous = Manifest(
                model=self.previous.model,
                chunking=self.previous.chunking,
                generation=committed,
                documents=int(docs),
                chunks=int(chunks),
                updated_at=time.time(),
                vectors=described,
            )
            self.previous.write(self.index_dir)

    def close(self) -> None:
        """Close; changes not published are rolled back."""
        try:
            if self.conn.in_transaction:
                self.conn.execute("ROLLBACK")
        except sqlite3.Error:
            pass  # closing discards the transaction all the same
        self.conn.close()

    def __enter__(self) -> IndexWriter:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def known(self) -> dict[str, tuple[str, str]]:
        """Every stored document id with its (collection, content hash)."""
        rows = self.conn.execute("SELECT id, collection, content_hash FROM documents")
        return {r[0]: (r[1], r[2]) for r in rows}

    def labels(self) -> dict[str, tuple[tuple[str, ...], tuple[str, ...]]]:
        """Every stored document id with its (groups, tags)."""
        rows = self.conn.execute("SELECT id, groups, tags FROM documents")
        return {r[0]: (tuple(json.loads(r[1])), tuple(json.loads(r[2]))) for r in rows}

    def relabel(self, document_id: str, groups: Sequence[str], tags: Sequence[str]) -> None:
        """Change who may read a document, and its tags, without touching its chunks."""
        try:
            self.conn.execute(
                "UPDATE documents SET groups = ?, tags = ? WHERE id = ?",
                [dump(groups), dump(tags), document_id],
            )
        except sqlite3.Error as exc:
            raise self._write_failed(exc) from exc

    def stored_vectors(self, document_id: str) -> dict[str, np.ndarray]:
        """Vectors of a document's current chunks by embed hash, for reuse."""
        rows = self.conn.execute(
            "SELECT embed_hash, vector FROM chunks WHERE document_id = ?", [document_id]
        )
        return {r[0]: np.frombuffer(r[1], dtype=np.float32).copy() for r in rows}

    def _write_failed(self, exc: BaseException) -> IndexStoreError:
        return IndexStoreError(
            f"cannot write to the index at {self.index_dir}: {exc} (is the disk full, or the "
            "folder read-only?); the last published generation is unchanged and still served"
        )

    def put(
        self,
        doc: Document,
        collection: str,
        chunks: Sequence[Chunk],
        vectors: np.ndarray,
        *,
        groups: Sequence[str] = (),
        tags: Sequence[str] = (),
    ) -> None:
        """Store ``doc`` and its chunks, replacing any earlier version.

        ``groups`` may read it (none: everyone); ``tags`` are for filtering.
        """
        try:
            self._put(doc, collection, chunks, vectors, groups, tags)
        except (sqlite3.Error, OSError) as exc:
            raise self._write_failed(exc) from exc

    def _put(
        self,
        doc: Document,
        collection: str,
        chunks: Sequence[Chunk],
        vectors: np.ndarray,
        groups: Sequence[str],
        tags: Sequence[str],
    ) -> None:
        if len(chunks) != len(vectors):
            raise ValueError("one vector per chunk")
        if vectors.size and vectors.shape[1] != self.dimension:
            raise IndexStoreError(
                f"vectors have {vectors.shape[1]} dimensions, index has {self.dimension}"
            )
        with self.db.atomic():
            self._drop_fts("SELECT id FROM chunks WHERE document_id = ?", [doc.id])
            self.conn.execute("DELETE FROM chunks WHERE document_id = ?", [doc.id])
            self.db["documents"].upsert(
                {
                    "id": doc.id,
                    "collection": collection,
                    "title": doc.title,
                    "source": doc.source,
                    "kind": doc.kind,
                    "modified": doc.modified,
                    "content_hash": doc.content_hash,
                    "metadata": json.dumps(doc.metadata, ensure_ascii=False, default=str),
                    "indexed_at": time.time(),
                    "groups": dump(groups),
                    "tags": dump(tags),
                },
                pk="id",
            )
            self.db["chunks"].insert_all(
                {
                    "document_id": doc.id,
                    "ordinal": c.ordinal,
                    "trail": json.dumps(list(c.trail), ensure_ascii=False),
                    "text": c.text,
                    "page": c.page,
                    "tokens": c.tokens,
                    "embed_hash": c.embed_hash,
                    "vector": _vector_blob(v),
                }
                for c, v in zip(chunks, vectors, strict=True)
            )
            # The lexical index changes in the same transaction as the chunks.
            self.conn.executemany(
                "INSERT INTO chunks_fts (rowid, body) SELECT id, ? FROM chunks "
                "WHERE document_id = ? AND ordinal = ?",
                [(lexical_body(doc.title, c.trail, c.text), doc.id, c.ordinal) for c in chunks],
            )

    def remove(self, document_ids: Iterable[str]) -> int:
        """Delete documents (and by cascade their chunks); how many were deleted."""
        ids = list(document_ids)
        try:
            return self._remove(ids)
        except (sqlite3.Error, OSError) as exc:
            raise self._write_failed(exc) from exc

    def _remove(self, ids: list[str]) -> int:
        removed = 0
        with self.db.atomic():
            for start in range(0, len(ids), 900):
                part = ids[start : start + 900]
                marks = ",".join("?" * len(part))
                self._drop_fts(f"SELECT id FROM chunks WHERE document_id IN ({marks})", part)
                removed += self.conn.execute(
                    f"DELETE FROM documents WHERE id IN ({marks})", part
                ).rowcount
        return removed

    def rebuild_lexical(self) -> int:
        """Refill the FTS5 index from the chunk rows; how many chunks it now holds."""
        with self.db.atomic():
            self.conn.execute("DELETE FROM chunks_fts")
            rows = self.conn.execute(
                "SELECT c.id, d.title, c.trail, c.text FROM chunks c "
                "JOIN documents d ON d.id = c.document_id"
            ).fetchall()
            self.conn.executemany(
                "INSERT INTO chunks_fts (rowid, body) VALUES (?, ?)",
                [(r[0], lexical_body(r[1], json.loads(r[2]), r[3])) for r in rows],
            )
        return len(rows)

    def _drop_fts(self, select_ids: str, params: Sequence[object]) -> None:
        """Delete the FTS rows of the chunks that ``select_ids`` selects."""
        self.conn.execute(f"DELETE FROM chunks_fts WHERE rowid IN ({select_ids})", list(params))

    def publish(self) -> Manifest:
        """Publish the run's changes as a new generation.

        Order matters for crash safety: the FAISS file of the new generation is
        written first (beside the old one); then the SQLite transaction commits,
        which is the single moment the new generation comes to exist (readers
        take the generation from SQLite, so they see either all of it or none);
        then the manifest is replaced, which running services watch; old vector
        files go last. A new transaction opens for any further changes.
        """
        committed = _state_generation(self.conn) or 0
        generation = max(self.previous.generation if self.previous else 0, committed) + 1
        index = self._updated_faiss()
        target = self.index_dir / vectors_filename(generation)
        tmp = target.with_name(f".{target.name}.tmp")
        try:
            faiss.write_index(index, str(tmp))
            with open(tmp, "rb") as fh:
                os.fsync(fh.fileno())
            os.replace(tmp, target)
        except (OSError, RuntimeError) as exc:
            tmp.unlink(missing_ok=True)
            raise self._write_failed(exc) from exc
        docs = self.conn.execute("SELECT count(*) FROM documents").fetchone()[0]
        self.conn.execute(
            "INSERT OR REPLACE INTO state (key, value) VALUES ('generation', ?)",
            [str(generation)],
        )
        try:
            self.conn.execute("COMMIT")
        except sqlite3.Error as exc:
            target.unlink(missing_ok=True)
            raise self._write_failed(exc) from exc
        manifest = Manifest(
            model=self.model,
            chunking={"max_tokens": self.chunking.max_tokens, "overlap": self.chunking.overlap},
            generation=generation,
            documents=int(docs),
            chunks=int(index.ntotal),
            updated_at=time.time(),
            vectors=describe_vectors(index),
        )
        manifest.write(self.index_dir)
        for old in self.index_dir.glob("vectors-*.faiss"):
            if old.name != target.name:
                old.unlink(missing_ok=True)
        self.previous = manifest
        self.conn.execute("BEGIN IMMEDIATE")
        return manifest

    def _updated_faiss(self) -> faiss.Index:
        """The previous generation's FAISS index brought in step with SQLite.

        Changed in place (ids removed and added) while its kind still suits the
        collection's size; built anew from the chunk rows when it is missing,
        unreadable, or :func:`~indexer.vectors.needs_rebuild` says so.
        """
        index = None
        if self.previous is not None:
            path = self.index_dir / self.previous.vectors_file
            if path.is_file():
                try:
                    index = faiss.read_index(str(path))
                except RuntimeError:
                    index = None  # unreadable: rebuilt from SQLite below
            if index is not None and index.d != self.dimension:
                index = None
        want = np.fromiter(
            (r[0] for r in self.conn.execute("SELECT id FROM chunks")), dtype=np.int64
        )
        choice = self.vector_choice
        if index is None or needs_rebuild(index, len(want), choice):
            ids, matrix = _load_vectors(self.conn, self.dimension)
            plan = plan_vectors(
                len(ids),
                self.dimension,
                kind=choice.kind,
                exact_below=choice.exact_below,
                nprobe=choice.nprobe,
            )
            return build_vectors(plan, ids, matrix)
        if choice.nprobe is not None and isinstance(index, faiss.IndexIVF):
            index.nprobe = min(choice.nprobe, index.nlist)
        have = index_ids(index)
        stale = np.setdiff1d(have, want, assume_unique=True)
        if len(stale):
            index.remove_ids(stale)
        missing = np.setdiff1d(want, have, assume_unique=True)
        if len(missing):
            ids, matrix = _load_vectors(self.conn, self.dimension, missing.tolist())
            index.add_with_ids(matrix, ids)
        return index


@dataclass(frozen=True)
class ChunkRecord:
    """One stored chunk, as readers get it."""

    id: int
    document_id: str
    ordinal: int
    trail: tuple[str, ...]
    text: str
    page: int | None
    tokens: int


@dataclass(frozen=True)
class DocumentRecord:
    """One stored document, as readers get it."""

    id: str
    collection: str
    title: str
    source: str
    kind: str
    modified: float
    content_hash: str
    metadata: dict[str, Any]
    indexed_at: float
    groups: tuple[str, ...] = ()
    tags: tuple[str, ...] = ()


def _chunk(row: sqlite3.Row) -> ChunkRecord:
    return ChunkRecord(
        id=row["id"],
        document_id=row["document_id"],
        ordinal=row["ordinal"],
        trail=tuple(json.loads(row["trail"])),
        text=row["text"],
        page=row["page"],
        tokens=row["tokens"],
    )


def _document(row: sqlite3.Row) -> DocumentRecord:
    return DocumentRecord(
        id=row["id"],
        collection=row["collection"],
        title=row["title"],
        source=row["source"],
        kind=row["kind"],
        modified=row["modified"],
        content_hash=row["content_hash"],
        metadata=json.loads(row["metadata"]),
        indexed_at=row["indexed_at"],
        groups=tuple(json.loads(row["groups"])),
        tags=tuple(json.loads(row["tags"])),
    )


_CHUNK_COLUMNS = "id, document_id, ordinal, trail, text, page, tokens"


class IndexReader:
    """Read-only view of one index generation: vectors in memory, rows from SQLite.

    Safe to share between threads: FAISS searches are read-only; SQLite is
    read through per-thread connections, or, when ``pinned``, through one
    connection holding a read transaction opened when the reader was made.
    SQLite's WAL mode then shows that connection the database exactly as it
    was, whatever a re-index commits meanwhile, so a long-lived reader (the
    service's) answers every request from one complete generation. (A run
    commits once, when it publishes, so every snapshot is a whole generation.)
    """

    def __init__(
        self, index_dir: Path, model: dict[str, Any] | None = None, *, pinned: bool = False
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
        self._pinned: sqlite3.Connection | None = None
        self._pin_lock = threading.Lock()
        if pinned:
            conn = _connect(self._db_path, readonly=True)
            conn.isolation_level = None
            conn.execute("BEGIN")
            self._pinned = conn
        # SQLite's commit makes a generation exist; the manifest may lag behind it
        # by a crash between the two, so the generation comes from the database.
        with self._connection() as conn:
            committed = _state_generation(conn)
        self._generation = committed if committed is not None else self.manifest.generation
        vectors = self.index_dir / vectors_filename(self._generation)
        try:
            self.vectors: faiss.Index = faiss.read_index(str(vectors))
        except RuntimeError:
            # A missing or unreadable vector file is derived data: rebuild it in memory,
            # of the kind (and nprobe) the manifest records.
            with self._connection() as conn:
                ids, matrix = _load_vectors(conn, self.dimension)
            recorded = VectorPlan.from_json(self.manifest.vectors)
            kind = recorded.kind if recorded.kind in KINDS else "auto"
            plan = plan_vectors(
                len(ids), self.dimension, kind=kind, nprobe=recorded.params.get("nprobe")
            )
            self.vectors = build_vectors(plan, ids, matrix)
        if self.vectors.d != self.dimension:
            raise IndexCorruptError(
                f"{vectors} has {self.vectors.d} dimensions, the manifest says {self.dimension}; "
                "rebuild the index with `sounding index --rebuild`"
            )

    @contextmanager
    def _connection(self) -> Iterator[sqlite3.Connection]:
        """The connection to read with, held exclusively for the block when pinned."""
        if self._pinned is not None:
            with self._pin_lock:
                yield self._pinned
            return
        conn = getattr(self._local, "conn", None)
        if conn is None:
            conn = _connect(self._db_path, readonly=True)
            self._local.conn = conn
        yield conn

    def _rows(self, sql: str, params: Sequence[object] = ()) -> list[sqlite3.Row]:
        with self._connection() as conn:
            return conn.execute(sql, list(params)).fetchall()

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
        return int(docs), int(self.vectors.ntotal)

    def search(
        self,
        queries: np.ndarray,
        k: int,
        *,
        selector: faiss.IDSelector | None = None,
        allowed: int | None = None,
    ) -> tuple[np.ndarray, np.ndarray]:
        """FAISS search: ``D`` scores and ``I`` chunk ids, shape (m, k); -1 pads.

        With ``selector`` only the chunk ids it selects are ranked; ``allowed``,
        how many that is, lets an IVF index probe more cells for a narrow one.
        """
        queries = np.ascontiguousarray(queries, dtype=np.float32)
        if queries.ndim != 2 or queries.shape[1] != self.dimension:
            raise ValueError(f"queries must have shape (m, {self.dimension})")
        k = max(1, min(k, int(self.vectors.ntotal) or 1))
        return search_vectors(self.vectors, queries, k, selector=selector, allowed=allowed)

    def lexical(
        self, match: str, k: int, where: SearchFilter | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        """BM25 search of the chunks: scores (higher is better) and chunk ids, best first.

        ``match`` must be a safe FTS5 expression (see :mod:`indexer.lexical`).
        With ``where``, only chunks of documents it admits are ranked (the
        condition is part of the query, so the top ``k`` are all admitted).
        """
        # Only whether the filter restricts anything: the admitted ids are not needed here.
        if where is None or not self._restricts(where):
            rows = self._rows(
                "SELECT rowid, bm25(chunks_fts) FROM chunks_fts WHERE chunks_fts MATCH ? "
                "ORDER BY bm25(chunks_fts) LIMIT ?",
                [match, int(k)],
            )
        else:
            cond, params = where.sql()
            rows = self._rows(
                "SELECT f.rowid, bm25(chunks_fts) FROM chunks_fts f "
                "JOIN chunks c ON c.id = f.rowid JOIN documents d ON d.id = c.document_id "
                f"WHERE chunks_fts MATCH ? AND {cond} ORDER BY bm25(chunks_fts) LIMIT ?",
                [match, *params, int(k)],
            )
        # FTS5's bm25() is negative, more negative is better; flip it for callers.
        scores = np.fromiter((-r[1] for r in rows), dtype=np.float32, count=len(rows))
        ids = np.fromiter((r[0] for r in rows), dtype=np.int64, count=len(rows))
        return scores, ids

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
                len(self._allowed) > _FILTER_CACHE or held > _FILTER_CACHE_IDS
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
            if len(self._counts) >= _FILTER_CACHE:
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
        for start in range(0, len(ids), 900):
            part = ids[start : start + 900]
            marks = ",".join("?" * len(part))
            for row in self._rows(
                f"SELECT {_CHUNK_COLUMNS} FROM chunks WHERE id IN ({marks})", part
            ):
                out[row["id"]] = _chunk(row)
        return out

    def documents(self, ids: Iterable[str]) -> dict[str, DocumentRecord]:
        """Document records by id; unknown ids are left out."""
        out: dict[str, DocumentRecord] = {}
        ids = list(dict.fromkeys(ids))
        for start in range(0, len(ids), 900):
            part = ids[start : start + 900]
            marks = ",".join("?" * len(part))
            for row in self._rows(f"SELECT * FROM documents WHERE id IN ({marks})", part):
                out[row["id"]] = _document(row)
        return out

    def document(self, document_id: str) -> DocumentRecord | None:
        return self.documents([document_id]).get(document_id)

    def document_chunks(self, document_id: str) -> list[ChunkRecord]:
        rows = self._rows(
            f"SELECT {_CHUNK_COLUMNS} FROM chunks WHERE document_id = ? ORDER BY ordinal",
            [document_id],
        )
        return [_chunk(r) for r in rows]

    def close(self) -> None:
        """Close this thread's connection, and the pinned one (ending its snapshot)."""
        conn = getattr(self._local, "conn", None)
        if conn is not None:
            conn.close()
            self._local.conn = None
        if self._pinned is not None:
            with self._pin_lock:
                self._pinned.close()
                self._pinned = None

    def __del__(self) -> None:
        # A pinned snapshot holds back WAL checkpoints: end it with the reader.
        pinned = getattr(self, "_pinned", None)
        if pinned is not None:
            pinned.close()
