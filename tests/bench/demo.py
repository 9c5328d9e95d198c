"""The demo wiki indexed once with the real encoder, for the demo benches.

``demo_searcher(index_dir)`` builds (or refreshes: unchanged files embed nothing) the index of
``demo_corpus/`` at ``index_dir`` and returns a searcher over it; the judged questions are
``tests/integration/demo_questions.json``.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Any

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))

from sounding.indexer.build import refresh_index  # noqa: E402
from sounding.indexer.embedding import SentenceTransformerEmbedder  # noqa: E402
from sounding.indexer.search import Searcher  # noqa: E402
from sounding.indexer.settings import IndexSettings, searcher_factory  # noqa: E402
from sounding.indexer.store import IndexReader  # noqa: E402

from tests.conftest import DEMO_CORPUS  # noqa: E402

QUESTIONS_FILE = REPO / "tests" / "integration" / "demo_questions.json"
DEFAULT_INDEX = Path("/tmp/sounding-demo-bench/index")


def questions() -> list[dict[str, Any]]:
    """The judged demo questions."""
    loaded: list[dict[str, Any]] = json.loads(QUESTIONS_FILE.read_text("utf-8"))
    return loaded


def demo_searcher(index_dir: Path = DEFAULT_INDEX) -> Searcher:
    """A searcher over the demo wiki's index at ``index_dir`` (built when missing)."""
    embedder = SentenceTransformerEmbedder(batch_size=64)
    settings = IndexSettings(index_dir=index_dir, batch_size=64)
    refresh_index([DEMO_CORPUS], settings, embedder)
    return searcher_factory(settings, embedder)(IndexReader(index_dir))


def normalized(text: str) -> str:
    """Lower case, markdown emphasis and code marks dropped, white space collapsed: an
    answer phrase written from the source file matches the indexed text."""
    return " ".join(text.replace("*", "").replace("`", "").lower().split())


def answer_rank(searcher: Searcher, question: dict[str, Any], mode: str, k: int = 10) -> int:
    """1-based rank of the first expected document in the top ``k`` (one passage per
    document, as the integration test asks); 0 when none is there."""
    hits = searcher.search(question["question"], k, mode=mode, max_per_document=1)
    for hit in hits:
        if hit.document_id in question["expected"]:
            return hit.rank
    return 0


def top1_and_mrr(ranks: list[int]) -> tuple[float, float]:
    """Share of questions answered first, and MRR@10 (a miss counts 0)."""
    if not ranks:
        return 0.0, 0.0
    return (
        sum(r == 1 for r in ranks) / len(ranks),
        sum(1 / r for r in ranks if r) / len(ranks),
    )
