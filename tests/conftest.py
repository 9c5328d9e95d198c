"""Shared fixtures: the real encoder (loaded once), a seeded fake, benchmark paths."""

from __future__ import annotations

import os
from pathlib import Path

import pytest
from sounding.indexer.embedding import HashingEmbedder

REPO = Path(__file__).resolve().parent.parent
DEMO_CORPUS = REPO / "demo_corpus"
# Open IR collections in BEIR layout live beside the repository, never inside it:
# their licences are their sources', not ours. Point elsewhere with this variable.
BENCHMARKS_DIR = Path(
    os.environ.get("SOUNDING_BENCHMARKS_DIR", REPO.parent / "shared" / "benchmarks")
)


@pytest.fixture(scope="session")
def real_embedder():
    """The bundled all-MiniLM-L6-v2, loaded once per test session."""
    from sounding.indexer.embedding import SentenceTransformerEmbedder

    return SentenceTransformerEmbedder(batch_size=64)


@pytest.fixture
def fake_embedder() -> HashingEmbedder:
    """A seeded, model-free encoder for plumbing tests."""
    return HashingEmbedder(dimension=32, seed=7)
