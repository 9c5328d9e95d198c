"""Retrieval quality of the service on open IR collections (fixtures in conftest.py)."""

from __future__ import annotations

import sqlite3
from contextlib import closing

import pytest

from tests.quality.conftest import read_corpus

pytestmark = pytest.mark.slow

# all-MiniLM-L6-v2 model card: input longer than 256 word pieces is truncated.
MAX_SEQ_LENGTH = 256


def test_index_holds_every_document_in_whole_chunks(benchmark, real_embedder) -> None:
    assert real_embedder.max_tokens == MAX_SEQ_LENGTH
    records = read_corpus(benchmark.corpus)
    # Records with neither title nor text (Cranfield has two) have nothing to index.
    empty = {
        str(r["_id"])
        for r in records
        if not (r.get("title") or "").strip() and not (r.get("text") or "").strip()
    }
    skipped = benchmark.report.skipped
    assert all(s.reason == "no text" for s in skipped), skipped[:3]
    assert len(skipped) == len(empty)
    with closing(sqlite3.connect(benchmark.index_dir / "sounding.db")) as conn:
        ids = {r[0] for r in conn.execute("SELECT id FROM documents")}
        chunks, longest = conn.execute("SELECT count(*), max(tokens) FROM chunks").fetchone()
    assert ids == {str(r["_id"]) for r in records} - empty
    assert chunks >= len(ids)
    # Every chunk fits the encoder's max_seq_length (256 word pieces, all-MiniLM-L6-v2
    # model card), special tokens included, so the encoder never truncates a chunk.
    assert longest <= MAX_SEQ_LENGTH


def test_chunking_does_not_cost_quality(benchmark) -> None:
    dense = benchmark.dense_mean["ndcg@10"]
    reference = benchmark.reference_mean["ndcg@10"]
    # Project acceptance criterion: chunking must not cost quality — the service's
    # nDCG@10 is within 0.02 of the same encoder run on whole documents.
    assert dense >= reference - 0.02, (
        f"{benchmark.name}: service nDCG@10 {dense:.4f} < whole-document reference "
        f"{reference:.4f} - 0.02"
    )


def test_scifact_matches_published_figures(benchmarks) -> None:
    if "scifact" not in benchmarks.names:
        pytest.skip("no scifact folder among the benchmark collections")
    means = benchmarks["scifact"].dense_mean
    # Published nDCG@10 for all-MiniLM-L6-v2 on SciFact is about 0.645 (MTEB leaderboard,
    # recalled from memory, not re-checked); the dataset's SOURCE.md reports 0.6451
    # nDCG@10 / 0.9250 Recall@100 for the whole-document baseline with this encoder.
    assert means["ndcg@10"] >= 0.62, means
    # Same sources: SOURCE.md's whole-document baseline reaches Recall@100 0.9250.
    assert means["recall@100"] >= 0.88, means
