"""The writer that changes an index folder: one transaction a run, published as a generation."""

from __future__ import annotations

import json
import sqlite3
import time
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

import faiss
import numpy as np
import sqlite_utils

from ..access import dump
from ..chunking import Chunk, ChunkSettings
from ..documents import Document
from ..errors import IndexMismatchError, IndexMissingError, IndexStoreError
from ..vectorfile import in_step, read_vector_file, write_vector_file
from ..vectors import DEFAULT_CHOICE, VectorChoice, describe_vectors
from . import lexstore
from .format import (
    DATABASE,
    SCHEMA,
    SCHEMA_VERSION,
    Manifest,
    check_chunking,
    check_model,
    vectors_filename,
)
from .integrity import WITHOUT_CHUNKS
from .lexstore import lexical_body  # noqa: F401  (re-exported by the package)
from .modes import owner_only_folder
from .sqlite import (
    blob_vector,
    chunk_ids,
    connect,
    in_batches,
    load_vectors,
    state_generation,
    vector_blob,
)


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
            # The index holds document text: readable by its owner only, even when the
            # folder was made before (store/modes.py).
            owner_only_folder(self.index_dir)
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
            if rebuild:
                previous, other_schema = None, True
            else:
                # An older schema this writer can upgrade in place (raises for any other).
                previous = Manifest.read(self.index_dir, upgrade=True)
        upgrade = previous is not None and previous.schema_version != SCHEMA_VERSION
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
            self.conn = connect(db_path, readonly=False)
            self.conn.executescript(SCHEMA)
            # The whole run is one transaction, committed by publish(): a run that
            # dies, however it dies, leaves the last published generation as it was.
            self.conn.execute("BEGIN IMMEDIATE")
            self._roll_forward()
            if upgrade:
                # Schema 2 had one FTS5 table for all chunks; refill the per-class tables
                # from the chunk rows (no re-embedding). Published by this run.
                lexstore.rebuild(self.conn)
            if rebuild:
                lexstore.drop_all(self.conn)
                self.conn.execute("DELETE FROM documents")  # chunks go by cascade
        except sqlite3.OperationalError as exc:
            raise IndexStoreError(f"cannot open {db_path} for writing: {exc}") from exc
        except sqlite3.Error as exc:
            raise IndexStoreError(f"cannot open {db_path}: {exc}") from exc
        self.db = sqlite_utils.Database(self.conn)

    def _roll_forward(self) -> None:
        """Finish a publication that committed but died before replacing the manifest."""
        committed = state_generation(self.conn)
        if self.previous is None or committed is None or committed <= self.previous.generation:
            return
        path = self.index_dir / vectors_filename(committed)
        if path.is_file():
            docs, chunks = self._counts()
            # The committed file says what it is (an IVF's lists mapped, not read).
            index = read_vector_file(path, mmap=True)
            # Unreadable: the previous description stands, and the next publish rebuilds it.
            described = self.previous.vectors if index is None else describe_vectors(index)
            self.previous = Manifest(
                model=self.previous.model,
                chunking=self.previous.chunking,
                generation=committed,
                documents=docs,
                chunks=chunks,
                updated_at=time.time(),
                vectors=described,
                schema_version=self.previous.schema_version,  # an upgrade is not yet committed
            )
            self.previous.write(self.index_dir)

    def _counts(self) -> tuple[int, int]:
        docs = self.conn.execute("SELECT count(*) FROM documents").fetchone()[0]
        chunks = self.conn.execute("SELECT count(*) FROM chunks").fetchone()[0]
        return int(docs), int(chunks)

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

    def documents_without_chunks(self) -> list[str]:
        """Ids of the documents that have no chunk (damage ``sounding check`` repairs)."""
        return [r[0] for r in self.conn.execute(f"SELECT id {WITHOUT_CHUNKS}")]

    def relabel(self, document_id: str, groups: Sequence[str], tags: Sequence[str]) -> None:
        """Change who may read a document, and its tags, without re-embedding its chunks.

        New groups move its chunks' lexical rows to the table of their new class.
        """
        stored = dump(groups)
        try:
            with self.db.atomic():
                row = self.conn.execute(
                    "SELECT groups FROM documents WHERE id = ?", [document_id]
                ).fetchone()
                moved = row is not None and row[0] != stored
                if moved:
                    lexstore.drop_documents(self.conn, "?", [document_id])
                self.conn.execute(
                    "UPDATE documents SET groups = ?, tags = ? WHERE id = ?",
                    [stored, dump(tags), document_id],
                )
                if moved:
                    rows = lexstore.document_rows(self.conn, "d.id = ?", [document_id])
                    lexstore.index_rows(self.conn, rows)
        except sqlite3.Error as exc:
            raise self._write_failed(exc) from exc

    def stored_vectors(self, document_id: str) -> dict[str, np.ndarray]:
        """Vectors of a document's current chunks by embed hash, for reuse."""
        rows = self.conn.execute(
            "SELECT embed_hash, vector FROM chunks WHERE document_id = ?", [document_id]
        )
        return {r[0]: blob_vector(r[1]).copy() for r in rows}

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
            # From the class of the groups stored so far, before they change.
            lexstore.drop_documents(self.conn, "?", [doc.id])
            self.conn.execute("DELETE FROM chunks WHERE document_id = ?", [doc.id])
            self.db.table("documents").upsert(
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
            self.db.table("chunks").insert_all(
                {
                    "document_id": doc.id,
                    "ordinal": c.ordinal,
                    "trail": json.dumps(list(c.trail), ensure_ascii=False),
                    "text": c.text,
                    "page": c.page,
                    "tokens": c.tokens,
                    "embed_hash": c.embed_hash,
                    "vector": vector_blob(v),
                }
                for c, v in zip(chunks, vectors, strict=True)
            )
            # The lexical index changes in the same transaction as the chunks.
            ids = dict(
                self.conn.execute(
                    "SELECT ordinal, id FROM chunks WHERE document_id = ?", [doc.id]
                ).fetchall()
            )
            lexstore.add_chunks(
                self.conn,
                dump(groups),
                [(ids[c.ordinal], lexical_body(doc.title, c.trail, c.text)) for c in chunks],
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
            for part, marks in in_batches(ids):
                lexstore.drop_documents(self.conn, marks, part)
                removed += self.conn.execute(
                    f"DELETE FROM documents WHERE id IN ({marks})", part
                ).rowcount
        return removed

    def rebuild_lexical(self) -> int:
        """Refill the lexical tables (one per access class) from the chunk rows; how many
        chunks they now hold."""
        with self.db.atomic():
            return lexstore.rebuild(self.conn)

    def publish(self) -> Manifest:
        """Publish the run's changes as a new generation.

        Order matters for crash safety: the FAISS file of the new generation is
        written first (beside the old one); then the SQLite transaction commits,
        which is the single moment the new generation comes to exist (readers
        take the generation from SQLite, so they see either all of it or none);
        then the manifest is replaced, which running services watch; old vector
        files go last. A new transaction opens for any further changes.
        """
        committed = state_generation(self.conn) or 0
        generation = max(self.previous.generation if self.previous else 0, committed) + 1
        index = self._updated_faiss()
        target = self.index_dir / vectors_filename(generation)
        try:
            write_vector_file(index, target)
        except (OSError, RuntimeError) as exc:
            raise self._write_failed(exc) from exc
        docs = self.conn.execute("SELECT count(*) FROM documents").fetchone()[0]
        lexstore.prune(self.conn)  # classes no document is in any more
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
        """The previous generation's FAISS index brought in step with SQLite
        (see :func:`~indexer.vectorfile.in_step`); missing or unreadable, built anew."""
        index = None
        if self.previous is not None:
            index = read_vector_file(self.index_dir / self.previous.vectors_file)
        return in_step(
            index,
            chunk_ids(self.conn),
            self.dimension,
            lambda ids: load_vectors(self.conn, self.dimension, ids),
            self.vector_choice,
        )
