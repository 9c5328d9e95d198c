"""Retrieval quality on open IR collections: one index and one reference run per collection.

Each folder of ``BENCHMARKS_DIR`` in BEIR layout (corpus.jsonl, queries.jsonl,
qrels.tsv) becomes one value of the ``collection`` parameter. Every figure
comes from :func:`evaluate_collection` over one evaluation cache per session
(``SOUNDING_EVAL_CACHE`` if set, kept between sessions; else a pytest
temporary folder), so each collection is encoded once: the first mode asked
builds the index, every other mode and ``sounding eval --cache`` reuse it.
The whole-document reference run is kept in the same folder. A table of the
figures goes to the terminal summary and to ``test-artifacts/quality.txt``.
"""

from __future__ import annotations

import gzip
import json
import os
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import pytest

_REPO = Path(__file__).resolve().parents[2]
if str(_REPO) not in sys.path:  # `tests` is not a package pytest puts on sys.path
    sys.path.insert(0, str(_REPO))

from sounding.indexer.build import RefreshReport  # noqa: E402
from sounding.indexer.evaluation import find_corpus, mean  # noqa: E402
from sounding.indexer.experiment import (  # noqa: E402
    EvalResult,
    evaluate_collection,
    read_judged,
    score_run,
)
from sounding.indexer.indexcache import cache_key  # noqa: E402
from sounding.indexer.settings import IndexSettings  # noqa: E402

from tests.conftest import BENCHMARKS_DIR, REPO  # noqa: E402

DEPTH = 100
# The settings every quality figure is measured with; batch 64 as the session's encoder.
SETTINGS = IndexSettings(index_dir=Path("unused"), batch_size=64)
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
    """What one collection gave: the service's index, its figures per mode, the reference's."""

    name: str
    corpus: Path
    corpus_records: int
    index_dir: Path
    report: RefreshReport
    build_seconds: float
    reference_seconds: float
    reference: dict[str, dict[str, float]]
    cache_dir: Path
    embedder: object
    runs: dict[str, EvalResult]

    def result(self, mode: str) -> EvalResult:
        """The evaluation of this collection in ``mode`` (ranked once per session)."""
        if mode not in self.runs:
            self.runs[mode] = evaluate_collection(
                BENCHMARKS_DIR / self.name, mode, SETTINGS, self.embedder, cache_dir=self.cache_dir
            )
        return self.runs[mode]

    def means(self, mode: str) -> dict[str, float]:
        """Means over judged queries of ``ndcg@10``, ``recall@100``, ``mrr@10``, ``map``."""
        return self.result(mode).means

    @property
    def dense(self) -> dict[str, dict[str, float]]:
        return self.result("dense").per_query

    @property
    def dense_mean(self) -> dict[str, float]:
        return self.means("dense")

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
            f"{d['ndcg@10']:>8.4f} {r['ndcg@10']:>7.4f} "
            f"{d['ndcg@10'] - r['ndcg@10']:>+7.4f} {d['recall@100']:>7.4f} "
            f"{r['recall@100']:>7.4f} {d['mrr@10']:>7.4f} {r['mrr@10']:>7.4f}"
        )
    rows.append(
        "nDCG@10, R@100, MRR@10: means over judged queries (pytrec_eval); dense = sounding "
        "index (chunks, best chunk per document); ref = same encoder on whole documents; "
        "build s of an index reused from the evaluation cache is that of the run that built it"
    )
    return "\n".join(rows) + "\n"


class Benchmarks:
    """Evaluates each collection on first request, then serves its figures."""

    def __init__(self, cache_dir: Path, embedder) -> None:
        self.cache_dir = cache_dir
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
        dense = evaluate_collection(
            folder, "dense", SETTINGS, self._embedder, cache_dir=self.cache_dir
        )
        corpus = find_corpus(folder)
        records = read_corpus(corpus)
        reference, reference_seconds = self._reference(folder, corpus, records)
        return Benchmark(
            name=name,
            corpus=corpus,
            corpus_records=len(records),
            index_dir=dense.index.index_dir,
            report=dense.index.report,
            build_seconds=dense.index.build_seconds,
            reference_seconds=reference_seconds,
            reference=reference,
            cache_dir=self.cache_dir,
            embedder=self._embedder,
            runs={"dense": dense},
        )

    def _reference(self, folder: Path, corpus: Path, records: list[dict]):
        """Per-query figures of the same encoder on whole documents, exact search by cosine.

        Kept in the evaluation cache beside the index, under the same key.
        """
        kept = (
            self.cache_dir
            / f"reference-{folder.name}-{cache_key(corpus, SETTINGS, self._embedder)}.json"
        )
        if kept.is_file():
            saved = json.loads(kept.read_text(encoding="utf-8"))
            return saved["per_query"], saved["seconds"]
        import torch
        from sentence_transformers import util

        queries, qrels = read_judged(folder)
        qids = list(queries)  # file order, as this reference has always been encoded
        texts = [queries[q] for q in qids]
        started = time.monotonic()
        # Through the embedder, not its model: float32 unit rows whatever the precision
        # (a bf16 model's own encode returns bf16, whose scores would tie in the top 100).
        doc_emb = torch.from_numpy(
            self._embedder.encode([f"{r.get('title', '')} {r.get('text', '')}" for r in records])
        )
        query_emb = torch.from_numpy(self._embedder.encode(texts))
        hits = util.semantic_search(query_emb, doc_emb, top_k=DEPTH)
        seconds = time.monotonic() - started
        run = {
            qid: {str(records[h["corpus_id"]]["_id"]): float(h["score"]) for h in found}
            for qid, found in zip(qids, hits, strict=True)
        }
        per_query = score_run(run, qrels)[1]
        partial = kept.with_name(f".{kept.name}.{os.getpid()}")
        partial.write_text(json.dumps({"per_query": per_query, "seconds": seconds}), "utf-8")
        partial.replace(kept)  # whole or absent, as the cache's indexes
        return per_query, seconds


@pytest.fixture(scope="session")
def eval_cache(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The session's evaluation cache: $SOUNDING_EVAL_CACHE (kept), else a temporary folder."""
    named = os.environ.get("SOUNDING_EVAL_CACHE")
    if named:
        Path(named).mkdir(parents=True, exist_ok=True)
        return Path(named)
    return tmp_path_factory.mktemp("eval-cache")


@pytest.fixture(scope="session")
def benchmarks(eval_cache: Path, real_embedder) -> Benchmarks:
    """Index and runs of every collection, each built once per session on first use."""
    if not COLLECTIONS:
        pytest.skip(NO_DATA)
    return Benchmarks(eval_cache, real_embedder)


@pytest.fixture
def benchmark(benchmarks: Benchmarks, collection: str) -> Benchmark:
    """The figures of the ``collection`` under test."""
    return benchmarks[collection]


def pytest_terminal_summary(terminalreporter) -> None:
    if _DONE:
        terminalreporter.section("retrieval quality")
        terminalreporter.write(_table())
        terminalreporter.write_line(f"(also written to {REPORT})")
