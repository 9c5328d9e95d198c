"""``sounding eval``: rank judged queries, score them, compare two runs.

:func:`evaluate_collection` is the one "index, rank, score" of the project:
the command, the quality tests and the benchmarks all call it.

Metric names as the command reports them, and the trec_eval measure behind
each (computed by pytrec_eval, see :mod:`indexer.evaluation`).
"""

from __future__ import annotations

import tempfile
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .embedding import Embedder
from .errors import IndexMissingError, SettingsError
from .evaluation import evaluate, find_corpus, mean, read_qrels, read_queries, run_from_rankings
from .indexcache import CachedIndex, build_index, cached_index
from .search import Searcher, check_mode
from .settings import IndexSettings, searcher_factory
from .significance import PairedTest, paired_t_test, randomisation_test
from .store import IndexReader

# progress(stage, done, total): "indexing" counts chunks embedded, "queries" queries ranked.
Progress = Callable[[str, int, int], None]
# Queries ranked per batch when progress is shown (one batch otherwise).
_QUERY_STEP = 32

METRICS: dict[str, str] = {
    "ndcg@10": "ndcg_cut_10",
    "recall@100": "recall_100",
    "mrr@10": "recip_rank_10",
    "map": "map",
}


@dataclass
class EvalResult:
    """Scores of one system on one set of judged queries."""

    mode: str
    means: dict[str, float]
    per_query: dict[str, dict[str, float]]
    run: dict[str, dict[str, float]]
    # The index ranked and how it was built; None when it was a scratch index, now gone.
    index: CachedIndex | None = None

    def to_json(self) -> dict[str, float | int]:
        """Exactly the keys ``ndcg@10``, ``recall@100``, ``mrr@10``, ``map``, ``queries``."""
        return {**{m: round(self.means[m], 4) for m in METRICS}, "queries": len(self.per_query)}


def score_run(
    run: dict[str, dict[str, float]], qrels: dict[str, dict[str, int]]
) -> tuple[dict[str, float], dict[str, dict[str, float]]]:
    """(means, per-query values) keyed by the names in METRICS."""
    raw = evaluate(run, qrels, tuple(METRICS.values()))
    per_query = {q: {m: v[t] for m, t in METRICS.items()} for q, v in raw.items()}
    return mean(per_query), per_query


def read_judged(dataset_dir: Path) -> tuple[dict[str, str], dict[str, dict[str, int]]]:
    """Queries that have judgments, and the judgments, of a BEIR-layout folder."""
    qrels = read_qrels(dataset_dir / "qrels.tsv")
    queries = read_queries(dataset_dir / "queries.jsonl")
    judged = {q: t for q, t in queries.items() if q in qrels}
    if not judged:
        raise SettingsError(
            f"no query in {dataset_dir / 'queries.jsonl'} has a judgment in "
            f"{dataset_dir / 'qrels.tsv'}"
        )
    return judged, {q: qrels[q] for q in judged}


def evaluate_collection(
    dataset_dir: Path,
    mode: str,
    settings: IndexSettings,
    embedder: Embedder,
    *,
    cache_dir: Path | None = None,
    index_dir: Path | None = None,
    k: int = 100,
    progress: Progress | None = None,
) -> EvalResult:
    """Index a BEIR-layout folder, rank every judged query in ``mode``, score the ranking.

    Where the index comes from, in order: ``index_dir`` (used as it is, built from
    the folder's corpus first if it does not exist yet); the cache ``cache_dir``
    (an entry per corpus content, encoder and chunk settings, built once and reused,
    see :mod:`indexcache`); else a scratch index, thrown away afterwards. The
    searcher is the configured one (:func:`searcher_factory`: rrf_k, re-ranker).
    ``progress(stage, done, total)`` reports the chunks embedded (stage ``"indexing"``),
    then the queries ranked (``"queries"``).
    """
    mode = check_mode(mode)
    if k < 1:
        raise SettingsError(f"k={k} must be 1 or more")
    if index_dir is not None and cache_dir is not None:
        raise SettingsError("name an index folder or an evaluation cache, not both")
    dataset_dir = Path(dataset_dir)
    queries, qrels = read_judged(dataset_dir)
    if index_dir is not None:
        # A folder of judgments alone (`sounding judgments export`) ranks an existing
        # index: the corpus is looked for only when the index must be built.
        index_dir = Path(index_dir)
        try:
            reader = IndexReader(index_dir)
            built = CachedIndex(index_dir, None, 0.0, reused=True)
        except IndexMissingError:
            report, seconds = build_index(
                find_corpus(dataset_dir), settings, embedder, index_dir, _stage(progress)
            )
            built = CachedIndex(index_dir, report, seconds, reused=False)
            reader = IndexReader(index_dir)
        return _rank(reader, built, settings, embedder, queries, qrels, mode, k, progress)
    corpus = find_corpus(dataset_dir)
    if cache_dir is not None:
        built = cached_index(corpus, settings, embedder, cache_dir, _stage(progress))
        reader = IndexReader(built.index_dir)
        return _rank(reader, built, settings, embedder, queries, qrels, mode, k, progress)
    with tempfile.TemporaryDirectory(prefix="sounding-eval-") as scratch:
        index = Path(scratch) / "index"
        report, seconds = build_index(corpus, settings, embedder, index, _stage(progress))
        built = CachedIndex(index, report, seconds, reused=False)
        result = _rank(
            IndexReader(index), built, settings, embedder, queries, qrels, mode, k, progress
        )
    result.index = None  # the scratch folder is gone
    return result


def _rank(
    reader: IndexReader,
    built: CachedIndex,
    settings: IndexSettings,
    embedder: Embedder,
    queries: dict[str, str],
    qrels: dict[str, dict[str, int]],
    mode: str,
    k: int,
    progress: Progress | None = None,
) -> EvalResult:
    """Rank every query with the configured searcher over ``reader`` (closed after), score."""
    try:
        searcher = searcher_factory(settings, embedder)(reader)
        ids = sorted(queries)
        texts = [queries[q] for q in ids]
        rankings: list[list[tuple[str, float]]] = []
        step = _QUERY_STEP if progress else max(1, len(texts))
        for start in range(0, len(texts), step):
            if progress:
                progress("queries", start, len(texts))
            batch = texts[start : start + step]
            if searcher.reranker is None:
                rankings += searcher.rank_documents(batch, k, mode=mode)
            else:
                rankings += [_reranked_documents(searcher, text, k, mode) for text in batch]
        if progress:
            progress("queries", len(texts), len(texts))
    finally:
        reader.close()
    run = run_from_rankings(ids, rankings)
    means, per_query = score_run(run, qrels)
    return EvalResult(mode=mode, means=means, per_query=per_query, run=run, index=built)


def _stage(progress: Progress | None) -> Callable[[int, int], None] | None:
    """The indexer's chunk progress as the ``"indexing"`` stage of ``progress``."""
    if progress is None:
        return None
    return lambda done, total: progress("indexing", done, total)


def _reranked_documents(
    searcher: Searcher, text: str, k: int, mode: str
) -> list[tuple[str, float]]:
    """Documents ranked as the service ranks passages with the re-ranker, one per document.

    ``rank_documents`` has no re-ranking step; ``search`` re-ranks its top
    ``rerank_depth`` passages. Scores are rank-based: the re-ranked head's
    cross-encoder scores and the tail's are not comparable, and trec_eval
    orders a run by score.
    """
    hits = searcher.search(text, k, mode=mode, max_per_document=1)
    return [(h.document_id, float(len(hits) - i)) for i, h in enumerate(hits)]


@dataclass(frozen=True)
class MetricComparison:
    """Run B against run A on one metric, query by query."""

    metric: str
    mean_a: float
    mean_b: float
    wins: int  # queries where B scores higher
    losses: int
    ties: int
    t_test: PairedTest
    randomisation: PairedTest

    @property
    def difference(self) -> float:
        return self.mean_b - self.mean_a


def compare_runs(
    run_a: dict[str, dict[str, float]],
    run_b: dict[str, dict[str, float]],
    qrels: dict[str, dict[str, int]],
    *,
    seed: int = 0,
) -> list[MetricComparison]:
    """Per-metric comparison of two runs over every judged query."""
    _, per_a = score_run(run_a, qrels)
    _, per_b = score_run(run_b, qrels)
    queries = sorted(qrels)
    out: list[MetricComparison] = []
    for metric in METRICS:
        a = np.array([per_a[q][metric] for q in queries])
        b = np.array([per_b[q][metric] for q in queries])
        diff = b - a
        out.append(
            MetricComparison(
                metric=metric,
                mean_a=float(a.mean()),
                mean_b=float(b.mean()),
                wins=int(np.sum(diff > 1e-12)),
                losses=int(np.sum(diff < -1e-12)),
                ties=int(np.sum(np.abs(diff) <= 1e-12)),
                t_test=paired_t_test(a, b),
                randomisation=randomisation_test(a, b, seed=seed),
            )
        )
    return out
