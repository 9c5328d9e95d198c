"""Quality and latency per collection and mode: python tests/bench/quality.py [--cache DIR].

Prints a table: collection × precision × mode (dense, lexical, hybrid) × nDCG@10, Recall@100
(pytrec_eval, over all judged queries, top 100 documents) and single-query latency p50/p95 of
``Searcher.search(query, k=10)`` (warm, one query at a time, encoder included).
Indexes are built into --cache (kept between runs, one folder per precision) or a scratch folder.
``--precision fp32 bf16`` builds and queries each collection in both encoder precisions; it
also ranks the fp32 index with bf16 query vectors (prec ``fp32>bf16``), what a service that
switched precision sees before a re-index (the fingerprint ignores precision).
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

from sounding.indexer.build import refresh_index  # noqa: E402
from sounding.indexer.embedding import SentenceTransformerEmbedder  # noqa: E402
from sounding.indexer.evaluation import find_corpus, run_from_rankings  # noqa: E402
from sounding.indexer.experiment import read_judged, score_run  # noqa: E402
from sounding.indexer.search import MODES, Searcher  # noqa: E402
from sounding.indexer.settings import IndexSettings  # noqa: E402
from sounding.indexer.store import IndexReader  # noqa: E402

from tests.conftest import BENCHMARKS_DIR  # noqa: E402


def percentile(values: list[float], q: float) -> float:
    return statistics.quantiles(values, n=100, method="inclusive")[int(q) - 1]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cache", type=Path, help="keep indexes here between runs")
    parser.add_argument("--latency-queries", type=int, default=100)
    parser.add_argument(
        "--precision",
        nargs="+",
        default=["auto"],
        choices=["auto", "fp32", "bf16"],
        help="encoder precision(s) to compare",
    )
    parser.add_argument("collections", nargs="*", help="default: every collection found")
    args = parser.parse_args()
    names = args.collections or sorted(
        d.name for d in BENCHMARKS_DIR.iterdir() if (d / "qrels.tsv").is_file()
    )
    embedders = {p: SentenceTransformerEmbedder(batch_size=64, precision=p) for p in args.precision}
    scratch = tempfile.TemporaryDirectory()
    root = args.cache or Path(scratch.name)
    print(
        f"{'collection':<11}{'prec':<10}{'mode':<9}{'nDCG@10':>9}{'R@100':>8}{'p50 ms':>8}"
        f"{'p95 ms':>8}{'queries':>9}{'chunks':>8}{'build s':>9}"
    )
    for name in names:
        folder = BENCHMARKS_DIR / name
        queries, qrels = read_judged(folder)
        ids = sorted(queries)
        texts = [queries[q] for q in ids]
        runs = []  # (label, index precision, query encoder)
        for precision, embedder in embedders.items():
            runs.append(
                (
                    precision if precision != "auto" else f"auto:{embedder.precision}",
                    precision,
                    embedder,
                )
            )
        if {"fp32", "bf16"} <= embedders.keys():
            runs.append(("fp32>bf16", "fp32", embedders["bf16"]))
        for label, built_with, embedder in runs:
            # One folder per precision: the fingerprint ignores precision, so a shared
            # folder would keep the other precision's vectors.
            index_dir = root / (built_with if len(embedders) > 1 else "") / name
            settings = IndexSettings(index_dir=index_dir, batch_size=64)
            started = time.perf_counter()
            refresh_index([find_corpus(folder)], settings, embedders[built_with])
            build = time.perf_counter() - started
            searcher = Searcher(IndexReader(index_dir), embedder)
            for mode in MODES:
                run = run_from_rankings(ids, searcher.rank_documents(texts, 100, mode=mode))
                means, _ = score_run(run, qrels)
                searcher.search(texts[0], 10, mode=mode)  # warm
                times = []
                for text in texts[: args.latency_queries]:
                    started = time.perf_counter()
                    searcher.search(text, 10, mode=mode)
                    times.append((time.perf_counter() - started) * 1000)
                print(
                    f"{name:<11}{label:<10}{mode:<9}{means['ndcg@10']:>9.4f}"
                    f"{means['recall@100']:>8.4f}{percentile(times, 50):>8.1f}"
                    f"{percentile(times, 95):>8.1f}{len(ids):>9}"
                    f"{searcher.reader.counts()[1]:>8}{build:>9.1f}",
                    flush=True,
                )


if __name__ == "__main__":
    main()
