"""Re-ranking plumbing with a tiny, randomly initialised cross-encoder built by the test.

Its scores mean nothing; the tests check that the top candidates are re-ordered
exactly by what the cross-encoder says, through the library and over HTTP.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder, bundled_model_path
from sounding.indexer.errors import ModelError, QueryError
from sounding.indexer.rerank import CrossEncoderReranker, rerank
from sounding.indexer.search import Searcher
from sounding.indexer.store import IndexReader
from sounding.service.app import create_app
from sounding.service.settings import ServiceSettings

from tests.serving import serving


@pytest.fixture(scope="module")
def tiny_cross_encoder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    import torch
    from transformers import AutoTokenizer, BertConfig, BertForSequenceClassification

    torch.manual_seed(0)
    folder = tmp_path_factory.mktemp("tiny-cross-encoder")
    tok = AutoTokenizer.from_pretrained(str(bundled_model_path()))
    config = BertConfig(
        vocab_size=tok.vocab_size,
        hidden_size=32,
        num_hidden_layers=2,
        num_attention_heads=2,
        intermediate_size=64,
        num_labels=1,
        max_position_embeddings=512,
    )
    BertForSequenceClassification(config).save_pretrained(folder)
    tok.save_pretrained(folder)
    return folder


@pytest.fixture(scope="module")
def index(tmp_path_factory: pytest.TempPathFactory) -> ServiceSettings:
    root = tmp_path_factory.mktemp("docs")
    for i in range(12):
        (root / f"p{i}.md").write_text(f"# Pump {i}\n\nPump number {i} sits in hall {i % 3}.\n")
    settings = ServiceSettings(
        require_keys=False,
        index_dir=root.parent / "rerank-idx",
        rerank_depth=8,
    )
    refresh_index([root], settings, HashingEmbedder(16))
    return settings


@pytest.mark.slow  # builds and runs a torch model
def test_rerank_orders_by_cross_encoder_scores(tiny_cross_encoder: Path) -> None:
    from sentence_transformers import CrossEncoder

    reranker = CrossEncoderReranker(tiny_cross_encoder)
    texts = ["pump hall", "valve", "pump number five", "canteen menu", "hall"]
    direct = CrossEncoder(str(tiny_cross_encoder), device="cpu").predict(
        [("pump", t) for t in texts]
    )
    got = rerank("pump", list(enumerate(texts)), reranker)
    assert [i for i, _ in got] == list(np.argsort(-np.asarray(direct), kind="stable"))
    assert [s for _, s in got] == pytest.approx(sorted(direct.tolist(), reverse=True), rel=1e-5)


@pytest.mark.slow  # builds and runs a torch model
def test_searcher_reranks_only_the_top_candidates(index, tiny_cross_encoder: Path) -> None:
    emb = HashingEmbedder(16)
    plain = Searcher(IndexReader(index.index_dir), emb)
    reranker = CrossEncoderReranker(tiny_cross_encoder)
    ranked = Searcher(IndexReader(index.index_dir), emb, reranker=reranker, rerank_depth=8)
    base = plain.search("pump hall", 12, mode="dense")
    hits = ranked.search("pump hall", 12, mode="dense")
    top8 = {h.chunk_id for h in base[:8]}
    assert {h.chunk_id for h in hits[:8]} == top8
    assert [h.chunk_id for h in hits[8:]] == [h.chunk_id for h in base[8:]]
    scores = reranker.score("pump hall", [h.text for h in hits[:8]])
    assert list(scores) == sorted(scores, reverse=True)
    assert [h.chunk_id for h in ranked.search("pump hall", 12, mode="dense", rerank=False)] == [
        h.chunk_id for h in base
    ]


def test_asking_for_rerank_without_a_reranker_is_an_error(index) -> None:
    with pytest.raises(QueryError, match="reranker"):
        Searcher(IndexReader(index.index_dir), HashingEmbedder(16)).search("pump", rerank=True)


def test_bad_reranker_folder_is_a_model_error(tmp_path: Path) -> None:
    with pytest.raises(ModelError, match="reranker folder"):
        CrossEncoderReranker(tmp_path)


@pytest.mark.slow  # builds and runs a torch model
def test_service_reranks_when_configured(index, tiny_cross_encoder: Path) -> None:
    settings = index.model_copy(update={"reranker_path": tiny_cross_encoder})
    with serving(create_app(settings, embedder=HashingEmbedder(16))) as client:
        on = client.post("/search", json={"query": "pump hall", "k": 5, "mode": "dense"})
        off = client.post(
            "/search", json={"query": "pump hall", "k": 5, "mode": "dense", "rerank": False}
        )
    assert on.status_code == off.status_code == 200
    on_scores = [p["score"] for p in on.json()["results"]]
    off_scores = [p["score"] for p in off.json()["results"]]
    assert on_scores == sorted(on_scores, reverse=True)
    assert on_scores != off_scores  # cross-encoder scores, not cosine similarities


def test_service_refuses_rerank_without_a_reranker(index) -> None:
    with serving(create_app(index, embedder=HashingEmbedder(16))) as client:
        r = client.post("/search", json={"query": "pump", "rerank": True})
    assert r.status_code == 422 and "reranker" in r.json()["detail"]
