"""The on-disk index: round trip, manifest checks, FAISS ids against brute force."""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path

import numpy as np
import pytest
from sounding.indexer.chunking import Chunk, ChunkSettings
from sounding.indexer.documents import Document, Section
from sounding.indexer.embedding import HashingEmbedder, describe
from sounding.indexer.errors import IndexCorruptError, IndexMismatchError, IndexMissingError
from sounding.indexer.store import (
    DATABASE,
    MANIFEST,
    SCHEMA_VERSION,
    IndexReader,
    IndexWriter,
    Manifest,
)


def make_doc(i: int, n_chunks: int) -> tuple[Document, list[Chunk]]:
    doc = Document(
        id=f"notes/doc-{i}.md",
        title=f"Doc {i}",
        source=f"/wiki/notes/doc-{i}.md",
        modified=1_700_000_000.0 + i,
        content_hash=f"hash-{i}",
        kind="markdown",
        sections=(Section(("H",), "x"),),
        metadata={"tags": ["t"], "n": i},
    )
    chunks = [
        Chunk(
            ordinal=j,
            trail=("H", f"S{j}"),
            text=f"text {i}.{j}",
            embed_text=f"e {i}.{j}",
            tokens=5,
            page=j + 1 if i % 2 else None,
        )
        for j in range(n_chunks)
    ]
    return doc, chunks


def unit_rows(rng: np.random.Generator, n: int, d: int) -> np.ndarray:
    m = rng.standard_normal((n, d)).astype(np.float32)
    return np.ascontiguousarray(m / np.linalg.norm(m, axis=1, keepdims=True))


MODEL = describe(HashingEmbedder(16))


def build(tmp_path: Path, n_docs: int = 40, seed: int = 3):
    rng = np.random.default_rng(seed)
    stored: dict[tuple[str, int], np.ndarray] = {}
    with IndexWriter(tmp_path, MODEL, ChunkSettings()) as w:
        for i in range(n_docs):
            doc, chunks = make_doc(i, 1 + i % 4)
            vecs = unit_rows(rng, len(chunks), 16)
            w.put(doc, "notes", chunks, vecs)
            for c, v in zip(chunks, vecs, strict=True):
                stored[(doc.id, c.ordinal)] = v
        w.publish()
    return stored


def test_round_trip_keeps_every_field(tmp_path: Path) -> None:
    build(tmp_path, n_docs=5)
    r = IndexReader(tmp_path, MODEL)
    assert r.counts() == (5, 1 + 2 + 3 + 4 + 1)
    d = r.document("notes/doc-3.md")
    assert d is not None
    assert (d.title, d.source, d.collection, d.kind) == (
        "Doc 3",
        "/wiki/notes/doc-3.md",
        "notes",
        "markdown",
    )
    assert d.metadata == {"tags": ["t"], "n": 3} and d.content_hash == "hash-3"
    chunks = r.document_chunks("notes/doc-3.md")
    assert [(c.ordinal, c.trail, c.text, c.page) for c in chunks] == [
        (j, ("H", f"S{j}"), f"text 3.{j}", j + 1) for j in range(4)
    ]
    assert r.document("missing.md") is None


def test_faiss_ranking_matches_brute_force_numpy(tmp_path: Path) -> None:
    stored = build(tmp_path, n_docs=120)
    r = IndexReader(tmp_path, MODEL)
    # Map FAISS ids back through SQLite to (doc, ordinal) to compare with numpy.
    conn = sqlite3.connect(tmp_path / DATABASE)
    rows = conn.execute("SELECT id, document_id, ordinal FROM chunks")
    key = {cid: (doc, o) for cid, doc, o in rows}
    keys = list(stored)
    matrix = np.stack([stored[k] for k in keys])
    queries = unit_rows(np.random.default_rng(99), 25, 16)
    D, I = r.nearest(queries, 10)
    assert D.dtype == np.float32 and I.dtype == np.int64 and D.shape == I.shape == (25, 10)
    brute = queries @ matrix.T
    for q in range(25):
        order = np.argsort(-brute[q], kind="stable")[:10]
        assert [key[int(i)] for i in I[q]] == [keys[j] for j in order]
        np.testing.assert_allclose(D[q], brute[q][order], rtol=1e-5, atol=1e-5)


def test_replacing_a_document_drops_its_old_chunks_and_vectors(tmp_path: Path) -> None:
    build(tmp_path, n_docs=3)
    doc, chunks = make_doc(1, 1)
    with IndexWriter(tmp_path, MODEL, ChunkSettings()) as w:
        w.put(doc, "notes", chunks, unit_rows(np.random.default_rng(0), 1, 16))
        assert w.remove(["notes/doc-0.md"]) == 1
        m = w.publish()
    r = IndexReader(tmp_path, MODEL)
    assert m.generation == 2 and r.generation == 2
    assert r.counts() == (2, 1 + 3)
    assert [c.text for c in r.document_chunks("notes/doc-1.md")] == ["text 1.0"]
    assert r.document("notes/doc-0.md") is None
    # FAISS holds exactly the chunk ids SQLite holds.
    conn = sqlite3.connect(tmp_path / DATABASE)
    ids = sorted(i for (i,) in conn.execute("SELECT id FROM chunks"))
    D, I = r.nearest(unit_rows(np.random.default_rng(1), 1, 16), 100)
    assert sorted(int(i) for i in I[0] if i >= 0) == ids
    assert len(list(tmp_path.glob("vectors-*.faiss"))) == 1


def test_chunk_ids_are_never_reused(tmp_path: Path) -> None:
    build(tmp_path, n_docs=2)
    conn = sqlite3.connect(tmp_path / DATABASE)
    before = max(i for (i,) in conn.execute("SELECT id FROM chunks"))
    with IndexWriter(tmp_path, MODEL, ChunkSettings()) as w:
        w.remove(["notes/doc-1.md"])
        doc, chunks = make_doc(7, 2)
        w.put(doc, "notes", chunks, unit_rows(np.random.default_rng(0), 2, 16))
        w.publish()
    new = [i for (i,) in conn.execute("SELECT id FROM chunks WHERE document_id='notes/doc-7.md'")]
    assert min(new) > before


def test_manifest_records_model_chunking_and_schema(tmp_path: Path) -> None:
    build(tmp_path, n_docs=2)
    data = json.loads((tmp_path / MANIFEST).read_text())
    assert data["format"] == "sounding-index" and data["schema_version"] == SCHEMA_VERSION
    assert data["model"] == MODEL
    assert data["chunking"] == {"max_tokens": 256, "overlap": 32}
    assert data["vectors_file"] == "vectors-1.faiss" and (tmp_path / "vectors-1.faiss").is_file()
    assert (data["documents"], data["chunks"]) == (2, 3)


def test_other_model_is_refused_naming_both(tmp_path: Path) -> None:
    build(tmp_path, n_docs=2)
    other = describe(HashingEmbedder(24))
    with pytest.raises(IndexMismatchError) as err:
        IndexReader(tmp_path, other)
    msg = str(err.value)
    assert "hashing-16" in msg and "hashing-24" in msg and "16 dimensions" in msg
    with pytest.raises(IndexMismatchError, match="hashing-24"):
        IndexWriter(tmp_path, other, ChunkSettings())


def test_other_chunking_is_refused_unless_rebuilding(tmp_path: Path) -> None:
    build(tmp_path, n_docs=2)
    with pytest.raises(IndexMismatchError, match="chunk_tokens=128"):
        IndexWriter(tmp_path, MODEL, ChunkSettings(128, 16))
    with IndexWriter(tmp_path, MODEL, ChunkSettings(128, 16), rebuild=True) as w:
        assert w.known() == {}
        w.publish()
    assert Manifest.read(tmp_path).chunking == {"max_tokens": 128, "overlap": 16}


def test_missing_index_says_how_to_build_one(tmp_path: Path) -> None:
    with pytest.raises(IndexMissingError, match="sounding index"):
        IndexReader(tmp_path / "nowhere")


def test_lost_vector_file_is_rebuilt_from_sqlite(tmp_path: Path) -> None:
    build(tmp_path, n_docs=10)
    q = unit_rows(np.random.default_rng(5), 3, 16)
    D1, I1 = IndexReader(tmp_path).nearest(q, 5)
    (tmp_path / "vectors-1.faiss").unlink()
    D2, I2 = IndexReader(tmp_path).nearest(q, 5)
    np.testing.assert_array_equal(I1, I2)
    with IndexWriter(tmp_path, MODEL, ChunkSettings()) as w:
        w.publish()
    D3, I3 = IndexReader(tmp_path).nearest(q, 5)
    np.testing.assert_array_equal(I1, I3)


def test_garbled_manifest_is_reported(tmp_path: Path) -> None:
    build(tmp_path, n_docs=1)
    (tmp_path / MANIFEST).write_text("{not json")
    with pytest.raises(IndexCorruptError, match="manifest.json"):
        IndexReader(tmp_path)


def test_index_folder_is_private_to_its_owner(tmp_path: Path) -> None:
    build(tmp_path / "idx", n_docs=1)
    assert (tmp_path / "idx").stat().st_mode & 0o077 == 0


def test_pinned_reader_keeps_its_generation_while_a_writer_commits(tmp_path: Path) -> None:
    build(tmp_path, n_docs=4)
    pinned = IndexReader(tmp_path, MODEL, pinned=True)
    assert pinned.generation == 1 and pinned.counts()[0] == 4
    with IndexWriter(tmp_path, MODEL, ChunkSettings()) as w:
        w.remove(["notes/doc-0.md", "notes/doc-1.md"])
        # Mid-run, nothing is visible yet: a new reader still sees generation 1 whole.
        mid = IndexReader(tmp_path, MODEL, pinned=True)
        assert mid.generation == 1 and mid.counts()[0] == 4
        w.publish()
    assert pinned.counts()[0] == 4 and len(pinned.document_chunks("notes/doc-1.md")) == 2
    fresh = IndexReader(tmp_path, MODEL, pinned=True)
    assert fresh.generation == 2 and fresh.counts()[0] == 2
    pinned.close()


def test_a_run_that_dies_before_publishing_changes_nothing(tmp_path: Path) -> None:
    build(tmp_path, n_docs=4)
    w = IndexWriter(tmp_path, MODEL, ChunkSettings())
    w.remove(["notes/doc-0.md"])
    doc, chunks = make_doc(9, 2)
    w.put(doc, "notes", chunks, unit_rows(np.random.default_rng(0), 2, 16))
    w.close()  # as if killed: the transaction never committed
    r = IndexReader(tmp_path, MODEL)
    assert r.generation == 1 and r.counts() == (4, 1 + 2 + 3 + 4)
    assert r.document("notes/doc-0.md") is not None and r.document("notes/doc-9.md") is None


def test_a_commit_whose_manifest_was_not_written_is_rolled_forward(tmp_path: Path) -> None:
    build(tmp_path, n_docs=3)
    old_manifest = (tmp_path / MANIFEST).read_bytes()
    with IndexWriter(tmp_path, MODEL, ChunkSettings()) as w:
        w.remove(["notes/doc-0.md"])
        w.publish()
    (tmp_path / MANIFEST).write_bytes(old_manifest)  # died between commit and manifest
    r = IndexReader(tmp_path, MODEL)
    assert r.generation == 2 and r.counts()[0] == 2  # readers follow the database
    with IndexWriter(tmp_path, MODEL, ChunkSettings()):
        pass
    assert Manifest.read(tmp_path).generation == 2
