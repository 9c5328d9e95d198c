"""Over HTTP: concurrent requests with distinct queries each get their own answers, batched
or not, and a long question (2,000 characters) is accepted with its whole text ranked."""

from __future__ import annotations

import threading
import time
from collections.abc import Sequence
from pathlib import Path

import httpx
import numpy as np
import pytest
from fastapi import FastAPI
from sounding.indexer.batching import QueryBatcher
from sounding.indexer.embedding import HashingEmbedder

from tests.serving import served_index

PAGES = {
    f"p{i:02d}.md": f"# Station {i}\n\nThe sluice at station{i} opens when gauge{i} reads high; "
    f"pump {i % 5} drains it overnight.\n"
    for i in range(40)
}


class Slow(HashingEmbedder):
    """The seeded fake with a forward pass that takes time, so requests pile up."""

    def encode(self, texts: Sequence[str]) -> np.ndarray:
        time.sleep(0.01)
        return super().encode(texts)


@pytest.mark.slow  # seconds each: the fast loop stays under a minute
def test_concurrent_distinct_queries_each_get_their_own_answers(tmp_path: Path) -> None:
    apps: list[FastAPI] = []
    with served_index(
        tmp_path,
        PAGES,
        embedder=Slow(32, seed=7),
        socket=True,
        require_keys=False,
        query_batch=8,
        query_batch_wait_ms=3,
        app_hook=apps.append,
    ) as served:
        queries = [f"station{i} gauge{i} sluice" for i in range(40)]
        # One at a time first: each query's answer, encoded alone.
        expected = {}
        for q in queries:
            for mode in ("dense", "hybrid"):
                r = served.client.post("/search", json={"query": q, "k": 5, "mode": mode})
                assert r.status_code == 200, r.text
                expected[q, mode] = [(p["document_id"], p["score"]) for p in r.json()["results"]]
        batcher = apps[0].state.engine.embedder
        assert isinstance(batcher, QueryBatcher)
        sequential_batches = len(batcher.batch_sizes)

        errors: list[str] = []
        start = threading.Barrier(8)

        def client(n: int) -> None:
            with httpx.Client(base_url=served.url, timeout=30) as http:
                start.wait()
                for round_ in range(3):
                    for q in queries[n::8]:
                        mode = ("dense", "hybrid")[round_ % 2]
                        r = http.post("/search", json={"query": q, "k": 5, "mode": mode})
                        if r.status_code != 200:
                            errors.append(f"{q}: HTTP {r.status_code}")
                            continue
                        body = r.json()
                        got = [(p["document_id"], p["score"]) for p in body["results"]]
                        if body["query"] != q:
                            errors.append(f"{q}: answered for {body['query']!r}")
                        elif got != expected[q, mode]:
                            errors.append(f"{q} {mode}: {got} instead of {expected[q, mode]}")

        threads = [threading.Thread(target=client, args=(n,)) for n in range(8)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(timeout=120)
    assert errors == []
    # Answers differ between queries (so a crossed row would show), and some requests
    # shared an encoder call.
    assert len({tuple(expected[q, "dense"]) for q in queries}) == len(queries)
    assert max(batcher.batch_sizes[sequential_batches:]) > 1


def test_a_2000_character_question_is_accepted_and_ranked_whole(tmp_path: Path) -> None:
    with served_index(tmp_path, PAGES, require_keys=False) as served:
        assert served.settings.max_query_chars >= 2000
        # Words of no weight first (about 450 of them: far beyond the encoder's 256-piece
        # window), the one telling word last. The lexical ranking reads it; note that it
        # keeps the first 64 content words of a query (lexical.query_terms).
        question = ("and then it was that all of them would be there for it to do so " * 40)[:1985]
        question += " gauge17?"
        assert 1990 <= len(question) <= 2000
        r = served.client.post("/search", json={"query": question, "k": 3, "mode": "lexical"})
        assert r.status_code == 200, r.text
        assert r.json()["results"][0]["document_id"] == "p17.md"
        r = served.client.post("/search", json={"query": question, "k": 3, "mode": "hybrid"})
        assert r.status_code == 200, r.text
        too_long = served.client.post("/search", json={"query": "x" * 4001, "k": 3})
        assert too_long.status_code == 422
