"""The on-disk format of an index folder: file names, schema, manifest, last-run record.

Also the checks that an index was built by the configured encoder and chunking.
"""

from __future__ import annotations

import json
import os
import time
from contextlib import suppress
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ..chunking import ChunkSettings
from ..errors import IndexCorruptError, IndexMismatchError, IndexMissingError
from ..vectorfile import temporary_path
from ..vectors import EXACT, VectorPlan
from .modes import open_owner_only

SCHEMA_VERSION = 3
# Older schemas a writer upgrades in place (2: one FTS5 table for every chunk).
UPGRADABLE = (2,)
FORMAT = "sounding-index"
MANIFEST = "manifest.json"
DATABASE = "sounding.db"
LAST_RUN = "last-run.json"

SCHEMA = """
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
-- BM25 over each chunk's title, heading trail and text: one FTS5 table per access
-- class (distinct groups), lexical_<id>, listed here (indexer/store/lexstore.py).
CREATE TABLE IF NOT EXISTS lexical_classes (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    groups TEXT NOT NULL UNIQUE
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
        """Name of this generation's FAISS file."""
        return vectors_filename(self.generation)

    def to_json(self) -> dict[str, Any]:
        """The manifest as written to ``manifest.json``."""
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
    def read(cls, index_dir: Path, *, upgrade: bool = False) -> Manifest:
        """Read the manifest of ``index_dir``; IndexMissingError if there is none.

        ``upgrade`` also accepts the older schemas a writer upgrades (:data:`UPGRADABLE`).
        """
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
        version = data.get("schema_version")
        if version != SCHEMA_VERSION and not (upgrade and version in UPGRADABLE):
            how = (
                "upgrade it in place, without re-embedding, with `sounding check --repair` "
                "or the next `sounding index`"
                if version in UPGRADABLE
                else "rebuild it with `sounding index --rebuild`"
            )
            raise IndexMismatchError(
                f"index at {index_dir} has schema version {version}, this "
                f"sounding reads version {SCHEMA_VERSION}; {how}"
            )
        return cls(
            model=data["model"],
            chunking=data["chunking"],
            generation=int(data["generation"]),
            documents=int(data.get("documents", 0)),
            chunks=int(data.get("chunks", 0)),
            updated_at=float(data.get("updated_at", 0.0)),
            vectors=VectorPlan.from_json(data.get("vectors")).to_json(),
            schema_version=int(version),
        )

    def write(self, index_dir: Path) -> None:
        """Write atomically: a reader sees the old manifest or the new one, never half."""
        atomic_write(index_dir / MANIFEST, json.dumps(self.to_json(), indent=2).encode())


def atomic_write(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` through a temporary file: all of it or none is seen."""
    tmp = temporary_path(path)
    with open(open_owner_only(tmp), "wb") as fh:  # manifest and last run: owner-only too
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
        atomic_write(Path(index_dir) / LAST_RUN, json.dumps(record).encode())


def read_last_run(index_dir: Path) -> dict[str, Any] | None:
    """The last run's record (``finished_at``, ``result``, ``detail``), or None."""
    try:
        data = json.loads((Path(index_dir) / LAST_RUN).read_text("utf-8"))
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) else None


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
