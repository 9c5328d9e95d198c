"""sounding beside the naive approaches: python tests/bench/compare.py [--collection scifact].

One process, one corpus, the same judged queries for every system:

- ``naive``: what a user would write first. sentence-transformers
  ``SentenceTransformer(path).encode`` of every document (title + text, defaults:
  fp32, batch 32, truncated at the model's 256 word pieces), held in memory; at
  query time the query alone is encoded and ``sentence_transformers.util.semantic_search``
  scans every document (brute force). Document vectors are never re-encoded.
- ``bm25s``: BM25 from the bm25s library, English stopwords and the Snowball English
  stemmer (PyStemmer), title + text, as tests/quality/test_hybrid.py builds it.
- ``sounding dense|lexical|hybrid``: ``evaluate_collection``, which builds the index with
  ``refresh_index`` (chunks, SQLite, FTS5, FAISS) into the evaluation cache (``--cache``, or
  a scratch folder) once per ``--precision``, and the configured ``Searcher``.

Indexing time: wall clock from the corpus file to a searchable index, model already loaded
(of the run that built it, when the index comes from a kept --cache).
Latency: one query at a time, warm, every judged query, as a user asks: top 10 (naive and
bm25s: document ids and scores; sounding: ``Searcher.search(q, 10)`` passages with text).
Quality: nDCG@10 and Recall@100 (pytrec_eval, means over judged queries) of top-100
document rankings (sounding: ``Searcher.rank_documents``, a document scores as its best chunk).
Ratios are sounding / baseline: below 1 is better for times, above 1 for quality.

``--http``: also ``sounding hybrid HTTP``: the index just built served by ``sounding serve``
(its own process, loopback, keys off, the service's defaults: query batching, threads),
queried one at a time over HTTP with the same texts; quality columns repeat the hybrid row.
``--paragraphs N``: latencies (not quality: joined queries have no judgments) over
paragraphs of at least N characters (at most 2,000), made by joining consecutive judged
queries, as a chat bot sends a question with its context. cacm and med have the longest
queries of the shared collections.
"""

from __future__ import annotations

import argparse
import gzip
import json
import statistics
import sys
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))

from sounding.indexer.embedding import (  # noqa: E402
    SentenceTransformerEmbedder,
    bundled_model_path,
    quiet_offline,
)
from sounding.indexer.evaluation import find_corpus  # noqa: E402
from sounding.indexer.experiment import evaluate_collection, read_judged, score_run  # noqa: E402
from sounding.indexer.search import MODES  # noqa: E402
from sounding.indexer.settings import IndexSettings, searcher_factory  # noqa: E402
from sounding.indexer.store import IndexReader  # noqa: E402

DEPTH = 100


@dataclass
class Row:
    system: str
    index_s: float
    p50_ms: float
    p99_ms: float
    ndcg: float
    recall: float


def percentile(values: list[float], q: int) -> float:
    return statistics.quantiles(values, n=100, method="inclusive")[q - 1]


def latencies(texts: list[str], ask: Callable[[str], object]) -> tuple[float, float]:
    """(p50, p99) milliseconds of ``ask(text)``, one text at a time, after one warm call."""
    ask(texts[0])
    times = []
    for text in texts:
        started = time.perf_counter()
        ask(text)
        times.append((time.perf_counter() - started) * 1000)
    return percentile(times, 50), percentile(times, 99)


def read_records(path: Path) -> list[dict]:
    opener = gzip.open if path.suffix == ".gz" else open
    with opener(path, "rt", encoding="utf-8") as fh:
        return [json.loads(line) for line in fh if line.strip()]


def naive(records, ids, texts, qrels, timed) -> Row:
    quiet_offline()  # offline machine; keeps the loading bar out of the table
    from sentence_transformers import SentenceTransformer, util

    model = SentenceTransformer(str(bundled_model_path()), device="cpu")
    model.encode(["warm up"])
    started = time.perf_counter()
    corpus = model.encode(
        [f"{r.get('title', '')} {r.get('text', '')}" for r in records],
        convert_to_tensor=True,
        show_progress_bar=False,
    )
    index_s = time.perf_counter() - started
    run: dict[str, dict[str, float]] = {}
    for qid, text in zip(ids, texts, strict=True):
        hits = util.semantic_search(
            model.encode(text, convert_to_tensor=True), corpus, top_k=DEPTH
        )[0]
        run[qid] = {str(records[h["corpus_id"]]["_id"]): float(h["score"]) for h in hits}
    means, _ = score_run(run, qrels)
    p50, p99 = latencies(
        timed,
        lambda q: util.semantic_search(model.encode(q, convert_to_tensor=True), corpus, top_k=10),
    )
    return Row("naive st+semantic_search", index_s, p50, p99, means["ndcg@10"], means["recall@100"])


def bm25(records, ids, texts, qrels, timed) -> Row:
    import bm25s
    import Stemmer

    stemmer = Stemmer.Stemmer("english")
    started = time.perf_counter()
    retriever = bm25s.BM25()
    retriever.index(
        bm25s.tokenize(
            [f"{r.get('title', '')} {r.get('text', '')}" for r in records],
            stopwords="en",
            stemmer=stemmer,
            show_progress=False,
        ),
        show_progress=False,
    )
    index_s = time.perf_counter() - started

    def ask(query: str, k: int):
        return retriever.retrieve(
            bm25s.tokenize([query], stopwords="en", stemmer=stemmer, show_progress=False),
            k=k,
            show_progress=False,
        )

    run = {}
    for qid, text in zip(ids, texts, strict=True):
        docs, scores = ask(text, DEPTH)
        run[qid] = {
            str(records[i]["_id"]): float(s) for i, s in zip(docs[0], scores[0], strict=True)
        }
    means, _ = score_run(run, qrels)
    p50, p99 = latencies(timed, lambda q: ask(q, 10))
    return Row("bm25s", index_s, p50, p99, means["ndcg@10"], means["recall@100"])


def paragraphs(texts: list[str], chars: int) -> list[str]:
    """Consecutive texts joined into paragraphs of ``chars`` to 2,000 characters."""
    out: list[str] = []
    n = len(texts)
    for start in range(n):
        parts: list[str] = []
        i = start
        while sum(len(p) + 1 for p in parts) < chars and i < start + n:
            parts.append(texts[i % n].strip())
            i += 1
        out.append(" ".join(parts)[:2000])
    return out


def over_http(index_dir: Path, texts: list[str], hybrid: Row) -> Row:
    """Single-client hybrid latency against `sounding serve` on this index."""
    import httpx

    from tests.bench.load import serving

    with serving(index_dir) as (base, _), httpx.Client(base_url=base, timeout=60) as http:

        def ask(q: str) -> None:
            r = http.post("/search", json={"query": q, "k": 10, "mode": "hybrid"})
            r.raise_for_status()

        for q in texts[:20]:
            ask(q)
        p50, p99 = latencies(texts, ask)
    return Row("sounding hybrid HTTP", hybrid.index_s, p50, p99, hybrid.ndcg, hybrid.recall)


def sounding(
    folder: Path, texts, precision: str, cache: Path, timed: list[str], http: bool
) -> list[Row]:
    embedder = SentenceTransformerEmbedder(precision=precision)  # settings' default batch
    embedder.encode(["warm up"])
    settings = IndexSettings()
    rows = []
    for mode in MODES:
        # The first mode builds the index into the cache; the others rank the same index.
        result = evaluate_collection(folder, mode, settings, embedder, cache_dir=cache)
        searcher = searcher_factory(settings, embedder)(IndexReader(result.index.index_dir))
        p50, p99 = latencies(timed, lambda q, m=mode, s=searcher: s.search(q, 10, mode=m))
        searcher.reader.close()
        rows.append(
            Row(
                f"sounding {mode} ({embedder.precision})",
                result.index.build_seconds,
                p50,
                p99,
                result.means["ndcg@10"],
                result.means["recall@100"],
            )
        )
        if http and mode == "hybrid":
            rows.append(over_http(result.index.index_dir, timed, rows[-1]))
    return rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "--benchmarks",
        type=Path,
        default=REPO.parent / "shared" / "benchmarks",
        help="folder of BEIR-layout collections (default ../shared/benchmarks)",
    )
    parser.add_argument("--collection", default="scifact")
    parser.add_argument(
        "--cache", type=Path, help="evaluation cache: keep sounding's indexes here between runs"
    )
    parser.add_argument(
        "--precision",
        nargs="+",
        default=["auto"],
        choices=["auto", "fp32", "bf16"],
        help="sounding encoder precision(s)",
    )
    parser.add_argument("--http", action="store_true", help="also hybrid over HTTP")
    parser.add_argument("--paragraphs", type=int, default=0, help="time paragraphs of N chars")
    args = parser.parse_args()

    folder = args.benchmarks / args.collection
    corpus = find_corpus(folder)
    queries, qrels = read_judged(folder)
    ids = sorted(queries)
    texts = [queries[q] for q in ids]
    records = read_records(corpus)
    print(f"{args.collection}: {len(records)} documents, {len(ids)} judged queries", flush=True)
    timed = paragraphs(texts, args.paragraphs) if args.paragraphs else texts
    print(
        f"timed texts: {len(timed)}, median {statistics.median(len(t) for t in timed):.0f} "
        f"characters, longest {max(len(t) for t in timed)}",
        flush=True,
    )

    baselines = [naive(records, ids, texts, qrels, timed), bm25(records, ids, texts, qrels, timed)]
    with tempfile.TemporaryDirectory(prefix="sounding-compare-") as scratch:
        cache = args.cache or Path(scratch)
        ours = [
            r for p in args.precision for r in sounding(folder, texts, p, cache, timed, args.http)
        ]
    head = f"{'system':<28}{'index s':>9}{'p50 ms':>8}{'p99 ms':>8}{'nDCG@10':>9}{'R@100':>8}"
    print(head)
    for r in baselines + ours:
        print(
            f"{r.system:<28}{r.index_s:>9.1f}{r.p50_ms:>8.2f}{r.p99_ms:>8.2f}"
            f"{r.ndcg:>9.4f}{r.recall:>8.4f}"
        )
    print("\nratio sounding / baseline (times: < 1 is faster; quality: > 1 is better)")
    print(f"{'system':<28}{'vs':<8}{'index':>7}{'p50':>7}{'p99':>7}{'nDCG@10':>9}{'R@100':>7}")
    for r in ours:
        for b, tag in zip(baselines, ("naive", "bm25s"), strict=True):
            print(
                f"{r.system:<28}{tag:<8}{r.index_s / b.index_s:>7.2f}"
                f"{r.p50_ms / b.p50_ms:>7.2f}{r.p99_ms / b.p99_ms:>7.2f}"
                f"{r.ndcg / b.ndcg:>9.3f}{r.recall / b.recall:>7.3f}"
            )


if __name__ == "__main__":
    main()
