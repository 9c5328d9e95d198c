"""Quality and latency per collection and mode: python tests/bench/quality.py [--cache DIR].

Prints a table: collection × precision × mode (dense, lexical, hybrid) × nDCG@10, Recall@100
(pytrec_eval, over all judged queries, top 100 documents) and single-query latency p50/p95 of
``Searcher.search(query, k=10)`` (warm, one query at a time, encoder included).
Figures come from ``evaluate_collection``; indexes live in the evaluation cache --cache (kept
between runs, one entry per corpus, encoder, precision and chunk settings) or a scratch folder;
"build s" of a reused index is that of the run that built it.
``--demo`` first prints top-1 share and MRR@10 of the demo wiki's judged questions per mode
(tests/integration/demo_questions.json, old and new questions apart; the index is built at
--demo-index when missing); then only the collections named are run.
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

from sounding.indexer.embedding import SentenceTransformerEmbedder  # noqa: E402
from sounding.indexer.experiment import evaluate_collection, read_judged  # noqa: E402
from sounding.indexer.search import MODES  # noqa: E402
from sounding.indexer.settings import IndexSettings, searcher_factory  # noqa: E402
from sounding.indexer.store import IndexReader  # noqa: E402

from tests.bench.demo import (  # noqa: E402
    DEFAULT_INDEX,
    answer_rank,
    demo_searcher,
    questions,
    top1_and_mrr,
)
from tests.conftest import BENCHMARKS_DIR  # noqa: E402


def percentile(values: list[float], q: float) -> float:
    return statistics.quantiles(values, n=100, method="inclusive")[int(q) - 1]


def demo_table(index_dir: Path) -> None:
    """Top-1 share and MRR@10 on the demo questions, per mode and question set."""
    searcher = demo_searcher(index_dir)
    judged = questions()
    print(f"{'demo set':<10}{'mode':<9}{'top-1':>8}{'MRR@10':>8}{'questions':>10}")
    for mode in MODES:
        ranks = {q["question"]: answer_rank(searcher, q, mode) for q in judged}
        for name in ("old", "new", "all"):
            group = [ranks[q["question"]] for q in judged if name in ("all", q.get("set", "old"))]
            top1, mrr = top1_and_mrr(group)
            print(f"{name:<10}{mode:<9}{top1:>8.3f}{mrr:>8.3f}{len(group):>10}", flush=True)
    searcher.reader.close()
    print()


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
    parser.add_argument("--demo", action="store_true", help="top-1 and MRR@10 on the demo")
    parser.add_argument("--demo-index", type=Path, default=DEFAULT_INDEX)
    parser.add_argument("collections", nargs="*", help="default: every collection found")
    args = parser.parse_args()
    if args.demo:
        demo_table(args.demo_index)
        if not args.collections:
            return
    names = args.collections or sorted(
        d.name for d in BENCHMARKS_DIR.iterdir() if (d / "qrels.tsv").is_file()
    )
    embedders = {p: SentenceTransformerEmbedder(batch_size=64, precision=p) for p in args.precision}
    settings = IndexSettings(batch_size=64)
    scratch = tempfile.TemporaryDirectory()
    cache = args.cache or Path(scratch.name)
    print(
        f"{'collection':<11}{'prec':<10}{'mode':<9}{'nDCG@10':>9}{'R@100':>8}{'p50 ms':>8}"
        f"{'p95 ms':>8}{'queries':>9}{'chunks':>8}{'build s':>9}"
    )
    for name in names:
        folder = BENCHMARKS_DIR / name
        queries, _ = read_judged(folder)
        texts = [queries[q] for q in sorted(queries)]
        runs = []  # (label, index precision, query encoder)
        for precision, embedder in embedders.items():
            label = precision if precision != "auto" else f"auto:{embedder.precision}"
            runs.append((label, precision, embedder))
        if {"fp32", "bf16"} <= embedders.keys():
            runs.append(("fp32>bf16", "fp32", embedders["bf16"]))
        built: dict[str, Path] = {}  # index precision -> its index in the cache
        build_s: dict[str, float] = {}
        for label, built_with, embedder in runs:
            for mode in MODES:
                if built_with in built and embedder is not embedders[built_with]:
                    # Another precision's query vectors against this index, as it is.
                    result = evaluate_collection(
                        folder, mode, settings, embedder, index_dir=built[built_with]
                    )
                else:  # the cache key holds the precision: one index per precision
                    result = evaluate_collection(folder, mode, settings, embedder, cache_dir=cache)
                    built[built_with] = result.index.index_dir
                    build_s[built_with] = result.index.build_seconds
                searcher = searcher_factory(settings, embedder)(IndexReader(built[built_with]))
                searcher.search(texts[0], 10, mode=mode)  # warm
                times = []
                for text in texts[: args.latency_queries]:
                    started = time.perf_counter()
                    searcher.search(text, 10, mode=mode)
                    times.append((time.perf_counter() - started) * 1000)
                print(
                    f"{name:<11}{label:<10}{mode:<9}{result.means['ndcg@10']:>9.4f}"
                    f"{result.means['recall@100']:>8.4f}{percentile(times, 50):>8.1f}"
                    f"{percentile(times, 95):>8.1f}{len(texts):>9}"
                    f"{searcher.reader.counts()[1]:>8}{build_s[built_with]:>9.1f}",
                    flush=True,
                )
                searcher.reader.close()


if __name__ == "__main__":
    main()
