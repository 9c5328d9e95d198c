"""Retrieval quality on open IR collections: one index and one reference run per collection.

Each folder of ``BENCHMARKS_DIR`` in BEIR layout (corpus.jsonl, queries.jsonl,
qrels.tsv) becomes one value of the ``collection`` parameter. The service
index of a collection and its whole-document reference run are built once per
session, on first use, and shared by every test that asks for them. A table
of the figures goes to the terminal summary and to ``test-artifacts/quality.txt``.
"""

from __future__ import annotations

import gzip
import json
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import pytest

_REPO = Path(__file__).resolve().parents[2]
if str(_REPO) not in sys.path:  # `tests` is not a package pytest puts on sys.path
    sys.path.insert(0, str(_REPO))

from sounding.indexer.build import RefreshReport, refresh_index  # noqa: E402
from sounding.indexer.evaluation import (  # noqa: E402
    evaluate,
    find_corpus,
    mean,
    read_qrels,
    read_queries,
    run_from_rankings,
)
from sounding.indexer.search import Searcher  # noqa: E402
from sounding.indexer.settings import IndexSettings  # noqa: E402
from sounding.indexer.store import IndexReader  # noqa: E402

from tests.conftest import BENCHMARKS_DIR, REPO  # noqa: E402

MEASURES = ("ndcg_cut_10", "recall_100", "recip_rank_10", "map")
DEPTH = 100
REPORT = REPO / "test-artifacts" / "quality.txt"


def available_collections() -> list[str]:
    """Folders of BENCHMARKS_DIR that hold a BEIR dataset, by name."""
    if not BENCHMARKS_DIR.is_dir():
        return []
    return sorted(
        d.name
        for d in BENCHMARKS_DIR.iterdir()
        if d.is_dir()
        and (d / "queries.jsonl").is_file()
        and (d / "qrels.tsv").is_file()
        and any((d / n).is_file() for n in ("corpus.jsonl", "corpus.jsonl.gz"))
    )


COLLECTIONS = available_collections()
NO_DATA = (
    f"no benchmark collections in {BENCHMARKS_DIR} (BEIR folders with corpus.jsonl, "
    "queries.jsonl, qrels.tsv); set SOUNDING_BENCHMARKS_DIR to the folder that holds them"
)


def pytest_generate_tests(metafunc: pytest.Metafunc) -> None:
    if "collection" in metafunc.fixturenames:
        if COLLECTIONS:
            metafunc.parametrize("collection", COLLECTIONS)
        else:
            metafunc.parametrize(
                "collection", [pytest.param("none", marks=pytest.mark.skip(reason=NO_DATA))]
            )


@dataclass
class Benchmark:
    """What one collection gave: the service's index and both runs' figures."""

    name: str
    corpus: Path
    corpus_records: int
    index_dir: Path
    report: RefreshReport
    build_seconds: float
    reference_seconds: float
    dense: dict[str, dict[str, float]]
    reference: dict[str, dict[str, float]]

    @property
    def dense_mean(self) -> dict[str, float]:
        return mean(self.dense)

    @property
    def reference_mean(self) -> dict[str, float]:
        return mean(self.reference)


_DONE: dict[str, Benchmark] = {}


def read_corpus(path: Path) -> list[dict]:
    opener = gzip.open if path.suffix == ".gz" else open
    with opener(path, "rt", encoding="utf-8") as fh:
        return [json.loads(line) for line in fh if line.strip()]


def _table() -> str:
    head = (
        f"{'collection':<11} {'docs':>6} {'chunks':>6} {'build s':>8} {'nDCG@10':>8} "
        f"{'ref':>7} {'delta':>7} {'R@100':>7} {'ref':>7} {'MRR@10':>7} {'ref':>7}"
    )
    rows = [head, "-" * len(head)]
    for b in sorted(_DONE.values(), key=lambda b: b.name):
        d, r = b.dense_mean, b.reference_mean
        rows.append(
            f"{b.name:<11} {b.report.documents:>6} {b.report.chunks:>6} {b.build_seconds:>8.1f} "
            f"{d['ndcg_cut_10']:>8.4f} {r['ndcg_cut_10']:>7.4f} "
            f"{d['ndcg_cut_10'] - r['ndcg_cut_10']:>+7.4f} {d['recall_100']:>7.4f} "
            f"{r['recall_100']:>7.4f} {d['recip_rank_10']:>7.4f} {r['recip_rank_10']:>7.4f}"
        )
    rows.append(
        "nDCG@10, R@100, MRR@10: means over judged queries (pytrec_eval); dense = sounding "
        "index (chunks, best chunk per document); ref = same encoder on whole documents"
    )
    return "\n".join(rows) + "\n"


class Benchmarks:
    """Builds each collection's index and runs on first request, then serves them."""

    def __init__(self, factory: pytest.TempPathFactory, embedder) -> None:
        self._factory = factory
        self._embedder = embedder
        self.names: list[str] = list(COLLECTIONS)

    def __getitem__(self, name: str) -> Benchmark:
        if name not in _DONE:
            _DONE[name] = self._build(name)
            REPORT.parent.mkdir(parents=True, exist_ok=True)
            REPORT.write_text(_table(), encoding="utf-8")
        return _DONE[name]

    def _build(self, name: str) -> Benchmark:
        folder = BENCHMARKS_DIR / name
        corpus = find_corpus(folder)
        queries = read_queries(folder / "queries.jsonl")
        qrels = read_qrels(folder / "qrels.tsv")
        qids = [q for q in queries if q in qrels]
        texts = [queries[q] for q in qids]

        index_dir = self._factory.mktemp(f"index-{name}")
        started = time.monotonic()
        report = refresh_index(
            [corpus], IndexSettings(index_dir=index_dir, batch_size=64), self._embedder
        )
        build_seconds = time.monotonic() - started
        reader = IndexReader(index_dir)
        try:
            rankings = Searcher(reader, self._embedder).rank_documents(texts, k=DEPTH)
        finally:
            reader.close()
        dense = evaluate(run_from_rankings(qids, rankings), qrels, MEASURES)

        # Reference: the same encoder on whole documents, exact search by cosine.
        import torch
        from sentence_transformers import util

        records = read_corpus(corpus)
        started = time.monotonic()
        # Through the embedder, not its model: float32 unit rows whatever the precision
        # (a bf16 model's own encode returns bf16, whose scores would tie in the top 100).
        doc_emb = torch.from_numpy(
            self._embedder.encode([f"{r.get('title', '')} {r.get('text', '')}" for r in records])
        )
        query_emb = torch.from_numpy(self._embedder.encode(texts))
        hits = util.semantic_search(query_emb, doc_emb, top_k=DEPTH)
        reference_seconds = time.monotonic() - started
        ref_run = {
            qid: {str(records[h["corpus_id"]]["_id"]): float(h["score"]) for h in found}
            for qid, found in zip(qids, hits, strict=True)
        }
        reference = evaluate(ref_run, qrels, MEASURES)
        return Benchmark(
            name=name,
            corpus=corpus,
            corpus_records=len(records),
            index_dir=index_dir,
            report=report,
            build_seconds=build_seconds,
            reference_seconds=reference_seconds,
            dense=dense,
            reference=reference,
        )


@pytest.fixture(scope="session")
def benchmarks(tmp_path_factory: pytest.TempPathFactory, real_embedder) -> Benchmarks:
    """Index and runs of every collection, each built once per session on first use."""
    if not COLLECTIONS:
        pytest.skip(NO_DATA)
    return Benchmarks(tmp_path_factory, real_embedder)


@pytest.fixture
def benchmark(benchmarks: Benchmarks, collection: str) -> Benchmark:
    """The figures of the ``collection`` under test."""
    return benchmarks[collection]


def pytest_terminal_summary(terminalreporter) -> None:
    if _DONE:
        terminalreporter.section("retrieval quality")
        terminalreporter.write(_table())
        terminalreporter.write_line(f"(also written to {REPORT})")
