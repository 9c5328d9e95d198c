"""The FAISS index chosen by size: exact against brute-force numpy, IVF recall, selectors,
incremental changes through the writer, threshold crossings, manifest, check and repair."""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path

import faiss
import numpy as np
import pytest
from sounding.indexer.check import check_index, repair_index
from sounding.indexer.chunking import Chunk, ChunkSettings
from sounding.indexer.documents import Document, Section
from sounding.indexer.embedding import HashingEmbedder, describe
from sounding.indexer.errors import SettingsError
from sounding.indexer.store import DATABASE, MANIFEST, IndexReader, IndexWriter, Manifest
from sounding.indexer.vectors import (
    EXACT,
    IVF,
    VectorChoice,
    VectorPlan,
    build_vectors,
    describe_vectors,
    index_ids,
    needs_rebuild,
    plan_of,
    plan_vectors,
    search_vectors,
)

D = 16
MODEL = describe(HashingEmbedder(D))


def unit(m: np.ndarray) -> np.ndarray:
    return np.ascontiguousarray(m / np.linalg.norm(m, axis=1, keepdims=True), dtype=np.float32)


def clustered(rng: np.random.Generator, n: int, d: int, per: int = 50) -> np.ndarray:
    """Unit vectors around n/per random centres (a stand-in for topics)."""
    centres = rng.standard_normal((max(1, n // per), d))
    return unit(centres[rng.integers(0, len(centres), n)] + 0.5 * rng.standard_normal((n, d)))


def brute_force(queries: np.ndarray, matrix: np.ndarray, ids: np.ndarray, k: int):
    scores = queries @ matrix.T
    order = np.argsort(-scores, axis=1, kind="stable")[:, :k]
    return np.take_along_axis(scores, order, axis=1), ids[order]


def recall_at(found: np.ndarray, exact: np.ndarray) -> float:
    """10-recall@10 (intersection of the two top-k id sets), averaged over queries."""
    return float(
        np.mean([len(set(a) & set(b)) / exact.shape[1] for a, b in zip(found, exact, strict=True)])
    )


@pytest.fixture(scope="module")
def data() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(7)
    everything = clustered(rng, 6200, 32)
    ids = rng.permutation(100_000)[:6000].astype(np.int64) * 3 + 1  # sparse, unordered ids
    return ids, everything[:6000], everything[6000:]


@pytest.fixture(scope="module")
def ivf(data) -> faiss.Index:
    ids, matrix, _ = data
    return build_vectors(plan_vectors(len(ids), 32, exact_below=1000), ids, matrix)


# --- plans ---------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("n", "kind", "want"),
    [
        (0, "auto", EXACT),
        (999, "auto", EXACT),
        (1000, "auto", IVF),
        (10**6, "exact", EXACT),
        (50, "ivf", IVF),
        (0, "ivf", EXACT),  # nothing to train on
    ],
)
def test_plan_kind_by_size_and_setting(n: int, kind: str, want: str) -> None:
    assert plan_vectors(n, 32, kind=kind, exact_below=1000).kind == want


def test_ivf_plan_parameters_and_json_round_trip() -> None:
    plan = plan_vectors(1_000_000, 384)
    assert plan.kind == IVF and plan.params == {"nlist": 2000, "quantizer": "SQ8", "nprobe": None}
    assert plan_vectors(100, 8, kind="ivf").params["nlist"] == 2  # >= 39 training points a cell
    assert plan_vectors(10**5, 8, nprobe=10**6).params["nprobe"] == 632  # at most nlist
    assert VectorPlan.from_json(json.loads(json.dumps(plan.to_json()))) == plan
    assert VectorPlan.from_json(None) == VectorPlan(EXACT)  # a manifest from before plans


def test_unknown_kind_names_the_choices() -> None:
    with pytest.raises(SettingsError, match="'hnsw' is unknown; use one of auto, exact, ivf"):
        plan_vectors(10, 8, kind="hnsw")


# --- search against numpy ------------------------------------------------------------------


def test_exact_equals_brute_force_numpy(data) -> None:
    ids, matrix, queries = data
    index = build_vectors(plan_vectors(len(ids), 32), ids, matrix)
    assert plan_of(index) == VectorPlan(EXACT)
    D_, I_ = search_vectors(index, queries, 10)
    assert D_.dtype == np.float32 and I_.dtype == np.int64 and I_.shape == (200, 10)
    bD, bI = brute_force(queries, matrix, ids, 10)
    np.testing.assert_array_equal(I_, bI)
    np.testing.assert_allclose(D_, bD, rtol=1e-5, atol=1e-5)


def test_ivf_recall_at_10_reaches_095_against_exact(data, ivf) -> None:
    ids, matrix, queries = data
    params = describe_vectors(ivf)
    assert params["kind"] == IVF and params["quantizer"] == "SQ8"
    assert 1 <= params["nprobe"] < params["nlist"]  # calibrated: fewer cells than all
    _, I_ = search_vectors(ivf, queries, 10)
    _, exact = brute_force(queries, matrix, ids, 10)
    assert recall_at(I_, exact) >= 0.95
    assert sorted(index_ids(ivf)) == sorted(ids)


def test_exact_selector_equals_brute_force_over_the_allowed_set(data) -> None:
    ids, matrix, queries = data
    index = build_vectors(plan_vectors(len(ids), 32), ids, matrix)
    keep = np.random.default_rng(1).random(len(ids)) < 0.1
    D_, I_ = search_vectors(index, queries, 10, selector=faiss.IDSelectorBatch(ids[keep]))
    bD, bI = brute_force(queries, matrix[keep], ids[keep], 10)
    np.testing.assert_array_equal(I_, bI)
    np.testing.assert_allclose(D_, bD, rtol=1e-5, atol=1e-5)


@pytest.mark.parametrize("allowed", [600, 5])
def test_ivf_selector_returns_only_allowed_ids_and_fills_k(data, ivf, allowed: int) -> None:
    ids, matrix, queries = data
    pick = np.random.default_rng(2).choice(len(ids), allowed, replace=False)
    selector = faiss.IDSelectorBatch(ids[pick])
    _, I_ = search_vectors(ivf, queries, 10, selector=selector, allowed=allowed)
    allowed_ids = set(ids[pick].tolist())
    for row in I_:
        got = [int(i) for i in row if i >= 0]
        assert set(got) <= allowed_ids
        # A query whose probed cells hold too few allowed ids is searched over every cell.
        assert len(got) == min(10, allowed)
    _, exact = brute_force(queries, matrix[pick], ids[pick], min(10, allowed))
    assert recall_at(I_[:, : exact.shape[1]], exact) >= 0.95


# --- rebuild decisions ---------------------------------------------------------------------


def test_needs_rebuild_when_the_threshold_is_crossed_either_way(data, ivf) -> None:
    ids, matrix, _ = data
    exact = build_vectors(VectorPlan(EXACT), ids, matrix)
    choice = VectorChoice(exact_below=1000)
    assert not needs_rebuild(exact, 999, choice) and needs_rebuild(exact, 1000, choice)
    assert not needs_rebuild(ivf, 6000, choice) and needs_rebuild(ivf, 999, choice)
    assert needs_rebuild(ivf, 6000, VectorChoice(kind="exact"))
    assert needs_rebuild(exact, 10, VectorChoice(kind="ivf"))


def test_needs_rebuild_when_the_collection_drifts_far_from_the_trained_size(ivf) -> None:
    choice = VectorChoice(exact_below=1000)
    nlist = plan_of(ivf).params["nlist"]
    assert not needs_rebuild(ivf, 2 * 6000, choice) and not needs_rebuild(ivf, 4000, choice)
    assert needs_rebuild(ivf, 6000 * 5, choice) and needs_rebuild(ivf, 6000 // 5, choice)
    assert nlist == plan_vectors(6000, 32, exact_below=1000).params["nlist"]


# --- through the writer --------------------------------------------------------------------


def doc_chunks(i: int, n: int) -> tuple[Document, list[Chunk]]:
    doc = Document(
        id=f"d{i}.md",
        title=f"Doc {i}",
        source=f"/w/d{i}.md",
        modified=0.0,
        content_hash=f"h{i}",
        kind="markdown",
        sections=(Section((), "x"),),
    )
    return doc, [
        Chunk(ordinal=j, trail=(), text=f"t {i}.{j}", embed_text="", tokens=3) for j in range(n)
    ]


def put_docs(
    w: IndexWriter, first: int, count: int, rng: np.random.Generator, per: int = 10
) -> None:
    for i in range(first, first + count):
        doc, chunks = doc_chunks(i, per)
        # Documents gather along D axes, like topics.
        w.put(doc, "c", chunks, unit(rng.standard_normal((per, D)) + 2 * np.eye(D)[i % D]))


def stored(index_dir: Path) -> tuple[np.ndarray, np.ndarray]:
    conn = sqlite3.connect(index_dir / DATABASE)
    rows = conn.execute("SELECT id, vector FROM chunks ORDER BY id").fetchall()
    conn.close()
    ids = np.array([r[0] for r in rows], dtype=np.int64)
    return ids, np.stack([np.frombuffer(r[1], np.float32) for r in rows])


SMALL = VectorChoice(exact_below=1000)


def test_writer_changes_an_ivf_in_place_across_generations(tmp_path: Path) -> None:
    rng = np.random.default_rng(3)
    with IndexWriter(tmp_path, MODEL, ChunkSettings(), vectors=SMALL) as w:
        put_docs(w, 0, 300, rng)
        first = w.publish()
    assert first.vectors["kind"] == IVF and first.chunks == 3000
    on_disk = json.loads((tmp_path / MANIFEST).read_text())["vectors"]
    assert on_disk == first.vectors == Manifest.read(tmp_path).vectors
    with IndexWriter(tmp_path, MODEL, ChunkSettings(), vectors=SMALL) as w:
        w.remove([f"d{i}.md" for i in range(0, 300, 3)])  # 1,000 chunks go
        put_docs(w, 300, 150, rng)  # 1,500 come
        second = w.publish()
    # Same cells and calibrated nprobe: changed in place, not retrained.
    assert second.vectors == first.vectors and second.chunks == 3500
    reader = IndexReader(tmp_path, MODEL)
    ids, matrix = stored(tmp_path)
    assert sorted(index_ids(reader.faiss_index)) == ids.tolist()
    queries = unit(rng.standard_normal((50, D)) + 2 * np.eye(D)[rng.integers(0, D, 50)])
    _, I_ = reader.nearest(queries, 10)
    _, exact = brute_force(queries, matrix, ids, 10)
    assert recall_at(I_, exact) >= 0.95
    keep = ids[::7]
    _, I_ = reader.nearest(queries, 10, selector=faiss.IDSelectorBatch(keep))
    assert set(I_[I_ >= 0].tolist()) <= set(keep.tolist())


def test_writer_crosses_the_threshold_both_ways(tmp_path: Path) -> None:
    rng = np.random.default_rng(4)
    with IndexWriter(tmp_path, MODEL, ChunkSettings(), vectors=SMALL) as w:
        put_docs(w, 0, 90, rng)
        assert w.publish().vectors == {"kind": EXACT}
        put_docs(w, 90, 20, rng)  # 1,100 chunks
        grown = w.publish()
        assert grown.vectors["kind"] == IVF
        w.remove([f"d{i}.md" for i in range(30)])  # 800 chunks
        shrunk = w.publish()
    assert shrunk.vectors == {"kind": EXACT} and shrunk.chunks == 800
    reader = IndexReader(tmp_path, MODEL)
    ids, matrix = stored(tmp_path)
    q = unit(rng.standard_normal((5, D)))
    np.testing.assert_array_equal(reader.nearest(q, 10)[1], brute_force(q, matrix, ids, 10)[1])


def test_forced_kind_and_nprobe_setting(tmp_path: Path) -> None:
    rng = np.random.default_rng(5)
    with IndexWriter(tmp_path, MODEL, ChunkSettings(), vectors=VectorChoice("ivf")) as w:
        put_docs(w, 0, 20, rng)
        assert w.publish().vectors["kind"] == IVF  # 200 chunks, forced
    with IndexWriter(tmp_path, MODEL, ChunkSettings(), vectors=VectorChoice("ivf", nprobe=3)) as w:
        assert w.publish().vectors["nprobe"] == 3  # applied without retraining
    with IndexWriter(tmp_path, MODEL, ChunkSettings(), vectors=VectorChoice("exact")) as w:
        assert w.publish().vectors == {"kind": EXACT}


def test_old_manifest_without_vectors_entry_reads_as_exact(tmp_path: Path) -> None:
    rng = np.random.default_rng(6)
    with IndexWriter(tmp_path, MODEL, ChunkSettings()) as w:
        put_docs(w, 0, 5, rng)
        w.publish()
    path = tmp_path / MANIFEST
    data = json.loads(path.read_text())
    del data["vectors"]
    path.write_text(json.dumps(data))
    assert Manifest.read(tmp_path).vectors == {"kind": EXACT}
    assert IndexReader(tmp_path, MODEL).counts() == (5, 50)
    assert check_index(tmp_path).ok


def ivf_index(tmp_path: Path) -> Path:
    with IndexWriter(tmp_path, MODEL, ChunkSettings(), vectors=SMALL) as w:
        put_docs(w, 0, 150, np.random.default_rng(8))
        assert w.publish().vectors["kind"] == IVF
    return tmp_path


def test_reader_rebuilds_a_lost_ivf_file_in_memory_as_recorded(tmp_path: Path) -> None:
    ivf_index(tmp_path)
    recorded = Manifest.read(tmp_path).vectors
    (tmp_path / "vectors-1.faiss").unlink()
    reader = IndexReader(tmp_path, MODEL)
    assert describe_vectors(reader.faiss_index) == recorded
    assert reader.counts() == (150, 1500)


def test_check_and_repair_an_ivf_index(tmp_path: Path) -> None:
    ivf_index(tmp_path)
    assert check_index(tmp_path).ok
    # A chunk row gone behind the writer's back: the IVF still holds its vector.
    conn = sqlite3.connect(tmp_path / DATABASE)
    gone = conn.execute("SELECT min(id) FROM chunks").fetchone()[0]
    conn.execute("DELETE FROM lexical_1 WHERE rowid = ?", [gone])  # the one access class
    conn.execute("DELETE FROM chunks WHERE id = ?", [gone])
    conn.commit()
    conn.close()
    report = check_index(tmp_path)
    assert any("holds 1 entries with no chunk" in p for p in report.problems)
    after = repair_index(tmp_path, SMALL)
    assert after.ok, after.problems
    assert Manifest.read(tmp_path).vectors["kind"] == IVF
    assert gone not in index_ids(IndexReader(tmp_path, MODEL).faiss_index)
    # A garbled file is rebuilt as the settings choose.
    (tmp_path / "vectors-2.faiss").write_bytes(b"junk")
    assert not check_index(tmp_path).ok
    assert repair_index(tmp_path, SMALL).ok
    assert Manifest.read(tmp_path).vectors["kind"] == IVF


def test_check_finds_a_vector_file_of_another_kind_than_the_manifest(tmp_path: Path) -> None:
    ivf_index(tmp_path)
    path = tmp_path / MANIFEST
    data = json.loads(path.read_text())
    data["vectors"] = {"kind": EXACT}
    path.write_text(json.dumps(data))
    assert (
        "vectors-1.faiss holds an index of kind ivf, the manifest says exact"
        in check_index(tmp_path).problems
    )


def test_a_lost_manifest_update_is_rolled_forward_with_the_files_vector_kind(
    tmp_path: Path,
) -> None:
    rng = np.random.default_rng(9)
    with IndexWriter(tmp_path, MODEL, ChunkSettings(), vectors=SMALL) as w:
        put_docs(w, 0, 50, rng)
        w.publish()
    old_manifest = (tmp_path / MANIFEST).read_bytes()  # exact, generation 1
    with IndexWriter(tmp_path, MODEL, ChunkSettings(), vectors=SMALL) as w:
        put_docs(w, 50, 100, rng)
        assert w.publish().vectors["kind"] == IVF
    (tmp_path / MANIFEST).write_bytes(old_manifest)  # as if the run died after its commit
    with IndexWriter(tmp_path, MODEL, ChunkSettings(), vectors=SMALL) as w:
        assert w.previous is not None and w.previous.generation == 2
        assert w.previous.vectors["kind"] == IVF
    assert Manifest.read(tmp_path).vectors["kind"] == IVF and check_index(tmp_path).ok
