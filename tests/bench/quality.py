"""Quality and latency per collection and mode: python tests/bench/quality.py [--cache DIR].

Prints a table: collection × mode (dense, lexical, hybrid) × nDCG@10, Recall@100 (pytrec_eval,
over all judged queries, top 100 documents) and single-query latency p50/p95 of
``Searcher.search(query, k=10)`` (warm, one query at a time, encoder included).
Indexes are built into --cache (kept between runs) or a scratch folder.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))

from indexer.build import refresh_index  # noqa: E402
from indexer.embedding import SentenceTransformerEmbedder  # noqa: E402
from indexer.evaluation import find_corpus, run_from_rankings  # noqa: E402
from indexer.experiment import read_judged, score_run  # noqa: E402
from indexer.search import MODES, Searcher  # noqa: E402
from indexer.settings import IndexSettings  # noqa: E402
from indexer.store import IndexReader  # noqa: E402
from tests.conftest import BENCHMARKS_DIR  # noqa: E402


def percentile(values: list[float], q: float) -> float:
    return statistics.quantiles(values, n=100, method="inclusive")[int(q) - 1]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cache", type=Path, help="keep indexes here between runs")
    parser.add_argument("--latency-queries", type=int, default=100)
    parser.add_argument("collections", nargs="*", help="default: every collection found")
    args = parser.parse_args()
    names = args.collections or sorted(
        d.name for d in BENCHMARKS_DIR.iterdir() if (d / "qrels.tsv").is_file()
    )
    embedder = SentenceTransformerEmbedder(batch_size=64)
    scratch = tempfile.TemporaryDirectory()
    root = args.cache or Path(scratch.name)
    print(f"{'collection':<11}{'mode':<9}{'nDCG@10':>9}{'R@100':>8}{'p50 ms':>8}{'p95 ms':>8}"
          f"{'queries':>9}{'chunks':>8}")
    for name in names:
        folder = BENCHMARKS_DIR / name
        index_dir = root / name
        settings = IndexSettings(index_dir=index_dir, batch_size=64)
        refresh_index([find_corpus(folder)], settings, embedder)
        searcher = Searcher(IndexReader(index_dir), embedder)
        queries, qrels = read_judged(folder)
        ids = sorted(queries)
        texts = [queries[q] for q in ids]
        for mode in MODES:
            run = run_from_rankings(ids, searcher.rank_documents(texts, 100, mode=mode))
            means, _ = score_run(run, qrels)
            searcher.search(texts[0], 10, mode=mode)  # warm
            times = []
            for text in texts[: args.latency_queries]:
                started = time.perf_counter()
                searcher.search(text, 10, mode=mode)
                times.append((time.perf_counter() - started) * 1000)
            print(f"{name:<11}{mode:<9}{means['ndcg@10']:>9.4f}{means['recall@100']:>8.4f}"
                  f"{percentile(times, 50):>8.1f}{percentile(times, 95):>8.1f}"
                  f"{len(ids):>9}{searcher.reader.counts()[1]:>8}", flush=True)


if __name__ == "__main__":
    main()
