"""Shared fixtures: the real encoder (loaded once), a seeded fake, served indexes, paths."""

from __future__ import annotations

import os
from collections.abc import Callable, Iterator, Mapping
from contextlib import ExitStack
from pathlib import Path
from typing import Any

import pytest
from sounding.indexer.embedding import HashingEmbedder

from tests.serving import Served, served_index

REPO = Path(__file__).resolve().parent.parent
DEMO_CORPUS = REPO / "demo_corpus"
# Open IR collections in BEIR layout live beside the repository, never inside it:
# their licences are their sources', not ours. Point elsewhere with this variable.
BENCHMARKS_DIR = Path(
    os.environ.get("SOUNDING_BENCHMARKS_DIR", REPO.parent / "shared" / "benchmarks")
)

ServeIndex = Callable[..., Served]


@pytest.fixture(scope="session")
def real_embedder():
    """The bundled all-MiniLM-L6-v2, loaded once per test session."""
    from sounding.indexer.embedding import SentenceTransformerEmbedder

    return SentenceTransformerEmbedder(batch_size=64)


@pytest.fixture
def fake_embedder() -> HashingEmbedder:
    """A seeded, model-free encoder for plumbing tests."""
    return HashingEmbedder(dimension=32, seed=7)


@pytest.fixture(scope="module")
def serve_index(tmp_path_factory: pytest.TempPathFactory) -> Iterator[ServeIndex]:
    """Factory: ``serve_index(pages, **options)`` indexes and serves pages until the module ends.

    The options are those of ``tests.serving.served_index`` (encoder, keys, ``socket=True``
    for real uvicorn, ``ServiceSettings`` fields). Each call gets its own folder and index.
    """
    with ExitStack() as stack:

        def serve(pages: Mapping[str, str | bytes], **options: Any) -> Served:
            tmp = tmp_path_factory.mktemp("served")
            return stack.enter_context(served_index(tmp, pages, **options))

        yield serve
