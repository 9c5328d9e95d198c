"""Grounding quality: does the /context block hold the answer? python tests/bench/grounding.py

Demo wiki: for each judged question with an ``answer`` phrase (tests/integration/
demo_questions.json), the share whose phrase is inside the context text at budgets of 200,
400 and 800 encoder tokens (max_per_document 2, hybrid, as ``POST /context`` does), with
section continuation off (the behaviour before it) and on, old and new questions apart.
Shared collections (--collections, indexes from the evaluation cache --cache): the share of
queries with a relevant document cited within a 400-token budget.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))

from sounding.indexer.embedding import SentenceTransformerEmbedder  # noqa: E402
from sounding.indexer.experiment import evaluate_collection, read_judged  # noqa: E402
from sounding.indexer.grounding import token_counter  # noqa: E402
from sounding.indexer.search import Searcher  # noqa: E402
from sounding.indexer.settings import IndexSettings, searcher_factory  # noqa: E402
from sounding.indexer.store import IndexReader  # noqa: E402
from sounding.service.routes.context import PER_DOCUMENT_POOL, candidate_pool, ground  # noqa: E402

from tests.bench.demo import DEFAULT_INDEX, demo_searcher, normalized, questions  # noqa: E402
from tests.conftest import BENCHMARKS_DIR  # noqa: E402

BUDGETS = (200, 400, 800)
MAX_PER_DOCUMENT = 2


def context_text(searcher: Searcher, text: str, budget: int, continuation: bool) -> str:
    """The /context block for ``text`` at ``budget`` tokens, built as the route builds it."""
    query = searcher.query(
        text,
        candidate_pool(budget, "tokens"),
        mode="hybrid",
        max_per_document=max(PER_DOCUMENT_POOL, 4 * MAX_PER_DOCUMENT),
    )
    count = token_counter(searcher.embedder.tokenizer)
    return ground(searcher, query, budget, count, MAX_PER_DOCUMENT, continuation=continuation).text


def demo_shares(searcher: Searcher, continuation: bool) -> dict[tuple[str, int], float]:
    """(question set, budget) -> share of questions whose answer phrase is in the block."""
    judged = [q for q in questions() if q.get("answer")]
    out: dict[tuple[str, int], float] = {}
    for budget in BUDGETS:
        hits = {
            q["question"]: normalized(q["answer"])
            in normalized(context_text(searcher, q["question"], budget, continuation))
            for q in judged
        }
        for name in ("old", "new", "all"):
            group = [q for q in judged if name == "all" or q.get("set", "old") == name]
            out[name, budget] = sum(hits[q["question"]] for q in group) / max(1, len(group))
    return out


def cited_share(searcher: Searcher, folder: Path, budget: int, continuation: bool) -> float:
    """Share of a collection's judged queries with a relevant document cited in the block."""
    queries, qrels = read_judged(folder)
    count = token_counter(searcher.embedder.tokenizer)
    found = 0
    for qid, text in queries.items():
        relevant = {d for d, grade in qrels.get(qid, {}).items() if grade > 0}
        query = searcher.query(
            text,
            candidate_pool(budget, "tokens"),
            mode="hybrid",
            max_per_document=max(PER_DOCUMENT_POOL, 4 * MAX_PER_DOCUMENT),
        )
        chosen = ground(searcher, query, budget, count, MAX_PER_DOCUMENT, continuation=continuation)
        found += any(p.citation.document_id in relevant for p in chosen.passages)
    return found / max(1, len(queries))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--index", type=Path, default=DEFAULT_INDEX, help="demo index folder")
    parser.add_argument("--cache", type=Path, help="evaluation cache of the shared collections")
    parser.add_argument("--collections", nargs="*", default=[], help="shared collections")
    args = parser.parse_args()
    searcher = demo_searcher(args.index)
    print(
        f"{'corpus':<11}{'questions':<10}{'continuation':<14}" + "".join(f"{b:>8}" for b in BUDGETS)
    )
    for continuation in (False, True):
        shares = demo_shares(searcher, continuation)
        for name in ("old", "new", "all"):
            print(
                f"{'demo':<11}{name:<10}{'on' if continuation else 'off':<14}"
                + "".join(f"{shares[name, b]:>8.3f}" for b in BUDGETS),
                flush=True,
            )
    if not args.collections:
        return
    embedder = SentenceTransformerEmbedder(batch_size=64)
    settings = IndexSettings(batch_size=64)
    print(f"\n{'collection':<11}{'continuation':<14}{'cited@400':>10}{'queries':>9}")
    for name in args.collections:
        folder = BENCHMARKS_DIR / name
        index = evaluate_collection(folder, "dense", settings, embedder, cache_dir=args.cache).index
        shared = searcher_factory(settings, embedder)(IndexReader(index.index_dir))
        for continuation in (False, True):
            share = cited_share(shared, folder, 400, continuation)
            print(
                f"{name:<11}{'on' if continuation else 'off':<14}{share:>10.3f}"
                f"{len(read_judged(folder)[0]):>9}",
                flush=True,
            )
        shared.reader.close()


if __name__ == "__main__":
    main()
