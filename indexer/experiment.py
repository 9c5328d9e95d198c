"""``sounding eval``: rank judged queries, score them, compare two runs.

Metric names as the command reports them, and the trec_eval measure behind
each (computed by pytrec_eval, see :mod:`indexer.evaluation`).
"""

from __future__ import annotations

import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .build import refresh_index
from .embedding import Embedder
from .errors import IndexMissingError, SettingsError
from .evaluation import evaluate, find_corpus, mean, read_qrels, read_queries, run_from_rankings
from .search import Searcher, check_mode
from .settings import IndexSettings
from .significance import PairedTest, paired_t_test, randomisation_test
from .store import IndexReader

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

    def to_json(self) -> dict[str, float | int]:
        """Exactly the keys ``ndcg@10``, ``recall@100``, ``mrr@10``, ``map``, ``queries``."""
        return {**{m: round(self.means[m], 4) for m in METRICS}, "queries": len(self.per_query)}


def score_run(run: dict[str, dict[str, float]], qrels: dict[str, dict[str, int]]):
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


def evaluate_dataset(
    dataset_dir: Path,
    settings: IndexSettings,
    embedder: Embedder,
    *,
    mode: str = "hybrid",
    k: int = 100,
    index_dir: Path | None = None,
) -> EvalResult:
    """Rank every judged query of ``dataset_dir`` and score the ranking.

    With ``index_dir`` the index there is used (built from the folder's corpus
    first if it does not exist yet), so several modes can share one index;
    without it a scratch index is built and thrown away.
    """
    mode = check_mode(mode)
    if k < 1:
        raise SettingsError(f"k={k} must be 1 or more")
    dataset_dir = Path(dataset_dir)
    queries, qrels = read_judged(dataset_dir)
    if index_dir is not None:
        try:
            reader = IndexReader(index_dir)
        except IndexMissingError:
            build = settings.model_copy(update={"index_dir": Path(index_dir)})
            refresh_index([find_corpus(dataset_dir)], build, embedder)
            reader = IndexReader(index_dir)
        return _rank(Searcher(reader, embedder, rrf_k=settings.rrf_k), queries, qrels, mode, k)
    with tempfile.TemporaryDirectory(prefix="sounding-eval-") as scratch:
        build = settings.model_copy(update={"index_dir": Path(scratch) / "index"})
        refresh_index([find_corpus(dataset_dir)], build, embedder)
        searcher = Searcher(IndexReader(build.index_dir), embedder, rrf_k=settings.rrf_k)
        return _rank(searcher, queries, qrels, mode, k)


def _rank(searcher: Searcher, queries, qrels, mode: str, k: int) -> EvalResult:
    ids = sorted(queries)
    rankings = searcher.rank_documents([queries[q] for q in ids], k, mode=mode)
    run = run_from_rankings(ids, rankings)
    means, per_query = score_run(run, qrels)
    return EvalResult(mode=mode, means=means, per_query=per_query, run=run)


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
