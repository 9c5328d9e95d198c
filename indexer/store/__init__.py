"""The on-disk index: its layout, the writer that changes it and the reader that serves it.

Modules: :mod:`.format` (file names, schema, manifest, last-run record, the
model and chunking checks), :mod:`.sqlite` (connections and SQL helpers),
:mod:`.writer` (:class:`IndexWriter`), :mod:`.lexstore` and :mod:`.bm25` (the
lexical tables, and BM25 over those a caller may read), :mod:`.reader` (:class:`IndexReader`
and its records), :mod:`.integrity` (what ``sounding check`` reads). The
FAISS file's life (load or rebuild, keep in step, write) is
:mod:`indexer.vectorfile`.

Layout of an index folder (``SCHEMA_VERSION`` in :mod:`.format`)::

    manifest.json          what built the index and which generation is current
    last-run.json          outcome of the last indexing run (for monitoring)
    sounding.db            SQLite: documents, chunks (text, metadata and vector),
                           lexical_<id> (FTS5, BM25 over title + trail + text), one
                           table per access class (distinct groups), listed in
                           lexical_classes (see :mod:`.lexstore`, :mod:`.bm25`)
    vectors-<gen>.faiss    FAISS index over the chunk vectors, keyed by the chunk
                           ids SQLite assigns: exact (IndexIDMap2(IndexFlatIP)) or,
                           for large collections, IVF,SQ8 (see indexer/vectors.py);
                           the manifest's ``vectors`` entry names kind and parameters

SQLite is the source of truth: every chunk row keeps its float32 vector, so
the FAISS file is derived data that a writer (or a reader, in memory) can
always rebuild. Chunk ids come from ``AUTOINCREMENT`` and are never reused,
so a FAISS file one generation behind can only point at rows that are gone,
never at the wrong row.

A run publishes in this order, so a crash at any point leaves one complete
generation (see :meth:`IndexWriter.publish`): the new FAISS file is written
beside the old one; the SQLite transaction commits (the single moment the new
generation exists: readers take the generation from SQLite); the manifest is
replaced; old vector files are deleted. A writer that finds a generation
committed but not in the manifest finishes the publication.
"""

from .format import (
    DATABASE,
    FORMAT,
    LAST_RUN,
    MANIFEST,
    SCHEMA,
    SCHEMA_VERSION,
    Manifest,
    atomic_write,
    check_chunking,
    check_model,
    read_last_run,
    vectors_filename,
    write_last_run,
)
from .integrity import DatabaseReport, inspect_database
from .lexstore import lexical_body
from .reader import ChunkRecord, DocumentRecord, HitRow, IndexReader
from .sqlite import open_side_database
from .writer import IndexWriter

__all__ = [
    "DATABASE",
    "FORMAT",
    "LAST_RUN",
    "MANIFEST",
    "SCHEMA",
    "SCHEMA_VERSION",
    "ChunkRecord",
    "DatabaseReport",
    "DocumentRecord",
    "HitRow",
    "IndexReader",
    "IndexWriter",
    "Manifest",
    "atomic_write",
    "check_chunking",
    "check_model",
    "inspect_database",
    "lexical_body",
    "open_side_database",
    "read_last_run",
    "vectors_filename",
    "write_last_run",
]
