"""Queries keep answering, each from one complete generation, while the index is rebuilt.

A real uvicorn server on loopback, 8 client threads with a bounded loop of queries, and two
full re-indexes in the meantime. Every document's text carries a marker naming the
generation that wrote it, so a response mixing generations cannot go unnoticed.
"""

from __future__ import annotations

import threading
import time
from collections import Counter
from pathlib import Path

import httpx
import pytest
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.service.app import create_app
from sounding.service.settings import ServiceSettings

from tests.serving import running

pytestmark = pytest.mark.slow  # 8 clients, up to 3,200 requests, two re-indexes

CLIENTS = 8
MAX_REQUESTS_PER_CLIENT = 400
MAX_SECONDS = 120


def write_generation(root: Path, generation: int, ids: range) -> None:
    for old in root.glob("*.md"):
        old.unlink()
    for i in ids:
        (root / f"d{i:03d}.md").write_text(
            f"# Reservoir note {i}\n\n## Levels\n\nmarker{generation} The reservoir level for "
            f"sluice {i} is logged hourly, pump {i % 7} runs at night.\n\n## Valves\n\n"
            f"marker{generation} Valve {i} is checked each week by the standby engineer.\n"
        )


def test_queries_answer_from_one_complete_generation_during_reindexes(tmp_path: Path) -> None:
    root = tmp_path / "wiki"
    root.mkdir()
    settings = ServiceSettings(
        require_keys=False,
        index_dir=tmp_path / "idx",
        reload_check_seconds=0,
    )
    embedder = HashingEmbedder(32, seed=3)
    plan = {1: range(0, 200), 2: range(0, 250), 3: range(100, 250)}  # docs per generation
    write_generation(root, 1, plan[1])
    refresh_index([root], settings, embedder)

    errors: list[str] = []
    seen: Counter[int] = Counter()
    stop = threading.Event()
    deadline = time.monotonic() + MAX_SECONDS

    def client(n: int, base: str) -> None:
        modes = ["hybrid", "dense", "lexical"]
        with httpx.Client(base_url=base, timeout=30) as http:
            for i in range(MAX_REQUESTS_PER_CLIENT):
                if stop.is_set() or time.monotonic() > deadline:
                    return
                try:
                    if i % 5 == 4:
                        h = http.get("/health").json()
                        gen = h["generation"]
                        if h["documents"] != len(plan[gen]):
                            errors.append(f"health of generation {gen}: {h['documents']} docs")
                        continue
                    r = http.post(
                        "/search",
                        json={
                            "query": f"reservoir valve pump {i % 7}",
                            "k": 10,
                            "mode": modes[(n + i) % 3],
                        },
                    )
                except httpx.HTTPError as exc:
                    errors.append(f"client {n}: {type(exc).__name__}: {exc}")
                    continue
                if r.status_code != 200:
                    errors.append(f"client {n}: HTTP {r.status_code}: {r.text[:200]}")
                    continue
                body = r.json()
                gen = body["generation"]
                seen[gen] += 1
                for p in body["results"]:
                    if f"marker{gen}" not in p["text"]:
                        errors.append(f"generation {gen} answered with {p['text'][:40]!r}")
                    if int(p["document_id"][1:4]) not in plan[gen]:
                        errors.append(f"generation {gen} returned {p['document_id']}")

    with running(create_app(settings, embedder=embedder)) as base:
        threads = [threading.Thread(target=client, args=(n, base)) for n in range(CLIENTS)]
        for t in threads:
            t.start()
        for generation in (2, 3):
            time.sleep(0.5)
            write_generation(root, generation, plan[generation])
            report = refresh_index([root], settings, embedder)
            assert report.generation == generation
            assert report.documents == len(plan[generation])
        time.sleep(1.0)  # let the clients see the last generation
        stop.set()
        for t in threads:
            t.join(timeout=60)
    assert errors == []
    assert seen[1] > 0 and seen[3] > 0, seen
