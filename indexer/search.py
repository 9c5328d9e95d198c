"""Ranking over a loaded index: queries in, ranked passages or documents out.

Three modes: ``dense`` (cosine similarity of encoder vectors, FAISS),
``lexical`` (BM25 over the chunks, SQLite FTS5) and ``hybrid`` (both fused by
reciprocal rank, the default).
"""

from __future__ import annotations

import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, fields
from functools import cached_property

from .embedding import Embedder, describe
from .fusion import RRF_K, fusion_depth, tiered_fusion
from .lexical import query_terms
from .query import MODES, Mode, Query, check_mode, make_query
from .rerank import Reranker
from .rerank import rerank as _rerank
from .selection import SearchFilter
from .store import HitRow, IndexReader, check_model

__all__ = [
    "MODES",
    "Hit",
    "Mode",
    "Query",
    "SearchFilter",
    "Searcher",
    "Timings",
    "check_mode",
    "make_query",
]

# Candidates each ranking contributes to a fusion, at the least.
_FUSION_DEPTH = 100


@dataclass(frozen=True)
class _Ranked:
    rank: int
    score: float


@dataclass(frozen=True)
class Hit(HitRow, _Ranked):
    """One ranked passage: a :class:`HitRow` with its rank and its score (cosine for
    dense, BM25 for lexical, RRF for hybrid).

    Fields in order rank, score, then the row's (dataclass fields follow the
    reverse method resolution order), as printed by ``sounding search --json``.
    """

    @classmethod
    def of(cls, row: HitRow, rank: int, score: float) -> Hit:
        """``row`` ranked ``rank`` with ``score``."""
        return cls(rank, score, *(getattr(row, name) for name in _ROW_FIELDS))


_ROW_FIELDS = tuple(f.name for f in fields(HitRow))


class Timings:
    """Milliseconds spent per stage of one search (encode, dense, lexical, fusion, fetch).

    Pass one to :meth:`Searcher.search` to see where a query's time goes;
    the service logs it at debug level and sends it as a Server-Timing header.
    """

    def __init__(self) -> None:
        self.ms: dict[str, float] = {}

    @contextmanager
    def stage(self, name: str) -> Iterator[None]:
        started = time.perf_counter()
        try:
            yield
        finally:
            self.ms[name] = self.ms.get(name, 0.0) + (time.perf_counter() - started) * 1000


_UNTIMED = Timings()  # stages of calls nobody asked to time land here and are ignored


class Searcher:
    """Answers queries against one :class:`IndexReader` with one encoder."""

    def __init__(
        self,
        reader: IndexReader,
        embedder: Embedder,
        *,
        rrf_k: int = RRF_K,
        reranker: Reranker | None = None,
        rerank_depth: int = 50,
    ) -> None:
        check_model(reader.manifest, describe(embedder), reader.index_dir)
        self.reader = reader
        self.embedder = embedder
        self.rrf_k = rrf_k
        self.reranker = reranker
        self.rerank_depth = rerank_depth

    @cached_property
    def _chunk_document(self) -> dict[int, str]:
        """Chunk id -> document id for the whole index (for document rankings)."""
        return self.reader.chunk_documents()

    # -- chunk rankings -------------------------------------------------------

    def _dense(
        self,
        queries: Sequence[str],
        depth: int,
        where: SearchFilter | None = None,
        timings: Timings = _UNTIMED,
    ) -> list[list[tuple[int, float]]]:
        admitted = self.reader.admitted(where)
        if admitted is not None and not len(admitted[0]):
            return [[] for _ in queries]
        ids, selector = admitted if admitted is not None else (None, None)
        with timings.stage("encode"):
            embedded = self.embedder.encode(list(queries))
        with timings.stage("dense"):
            D, I = self.reader.nearest(
                embedded, depth, selector=selector, allowed=None if ids is None else len(ids)
            )
        return [
            [(int(i), float(s)) for s, i in zip(d, ids, strict=True) if i >= 0]
            for d, ids in zip(D, I, strict=True)
        ]

    def _lexical(
        self,
        query: str,
        depth: int,
        where: SearchFilter | None = None,
        timings: Timings = _UNTIMED,
    ) -> list[tuple[int, float]]:
        terms = query_terms(query)
        if not terms:
            return []
        with timings.stage("lexical"):
            scores, ids = self.reader.bm25(terms, depth, where)
        return list(zip(ids.tolist(), scores.tolist(), strict=True))

    def ranked_chunks(
        self,
        query: str,
        depth: int,
        mode: Mode,
        where: SearchFilter | None = None,
        timings: Timings = _UNTIMED,
    ) -> list[tuple[int, float]]:
        """(chunk id, score) pairs, best first, at most ``depth`` of them.

        Only chunks that ``where`` admits are ranked: the filter applies
        before the cut at ``depth``, so a filtered search still fills it.
        """
        if mode == "dense":
            return self._dense([query], depth, where, timings)[0]
        if mode == "lexical":
            return self._lexical(query, depth, where, timings)
        pool = max(depth, _FUSION_DEPTH)
        dense = [c for c, _ in self._dense([query], pool, where, timings)[0]]
        lexical = [c for c, _ in self._lexical(query, pool, where, timings)]
        with timings.stage("fusion"):
            # The size of what the caller may read: chunks hidden from it change nothing.
            tier = fusion_depth(self.reader.readable_chunks(where))
            return tiered_fusion([dense, lexical], tier, k=self.rrf_k)[:depth]

    # -- passages -------------------------------------------------------------

    def query(
        self,
        text: str,
        k: int = 10,
        *,
        mode: str = "hybrid",
        max_per_document: int | None = None,
        rerank: bool | None = None,
        where: SearchFilter | None = None,
        max_k: int | None = None,
        max_query_chars: int | None = None,
    ) -> Query:
        """A :class:`Query` checked against this searcher (is there a reranker?) and the
        given limits; QueryError naming what is wrong. See :func:`make_query`."""
        return make_query(
            text,
            k,
            mode=mode,
            max_per_document=max_per_document,
            rerank=rerank,
            where=where,
            can_rerank=self.reranker is not None,
            max_k=max_k,
            max_query_chars=max_query_chars,
        )

    def search(
        self,
        text: str,
        k: int = 10,
        *,
        mode: str = "hybrid",
        max_per_document: int | None = None,
        rerank: bool | None = None,
        where: SearchFilter | None = None,
        timings: Timings | None = None,
    ) -> list[Hit]:
        """The ``k`` passages that best match ``text``, best first: :meth:`query`, then
        :meth:`run`. ``where`` restricts the documents searched (None: everything);
        ``rerank`` None means "when a reranker is configured"."""
        query = self.query(
            text, k, mode=mode, max_per_document=max_per_document, rerank=rerank, where=where
        )
        return self.run(query, timings)

    def run(self, query: Query, timings: Timings | None = None) -> list[Hit]:
        """The passages of a checked ``query``, best first, at most ``query.k``.

        With a reranker (and ``query.rerank`` not False) the top ``rerank_depth``
        candidates are re-ordered by the cross-encoder.
        """
        k, where, max_per_document = query.k, query.where, query.max_per_document
        # Dig deeper than k when passages per document are capped.
        depth = k if max_per_document is None else k * 4 + 32
        reranker = self.reranker if query.rerank is not False else None
        if reranker is not None:
            depth = max(depth, self.rerank_depth)
        timings = timings or _UNTIMED
        ranked = self.ranked_chunks(query.text, depth, query.mode, where, timings)
        with timings.stage("fetch"):
            # The filter again, in SQL: a second check behind the filtered rankings.
            rows = self.reader.hit_rows([c for c, _ in ranked], where)
        if reranker is not None:
            pool = [(c, rows[c].text) for c, _ in ranked[: self.rerank_depth] if c in rows]
            with timings.stage("rerank"):
                ranked = _rerank(query.text, pool, reranker) + ranked[self.rerank_depth :]
        hits: list[Hit] = []
        per_doc: dict[str, int] = {}
        for cid, score in ranked:
            row = rows.get(cid)
            if row is None:
                continue  # removed after this generation's vectors were written
            if max_per_document is not None:
                if per_doc.get(row.document_id, 0) >= max_per_document:
                    continue
                per_doc[row.document_id] = per_doc.get(row.document_id, 0) + 1
            hits.append(Hit.of(row, len(hits) + 1, float(score)))
            if len(hits) == k:
                break
        return hits

    # -- documents (evaluation) -----------------------------------------------

    def _best_per_document(
        self, ranked: list[tuple[int, float]], k: int
    ) -> list[tuple[str, float]]:
        """Documents scored by their best chunk, best first, at most ``k``."""
        chunk_doc = self._chunk_document
        best: dict[str, float] = {}
        for cid, score in ranked:
            doc = chunk_doc.get(cid)
            if doc is not None and doc not in best:
                best[doc] = score
                if len(best) == k:
                    break
        return list(best.items())

    def rank_documents(
        self, queries: list[str], k: int = 100, *, mode: str = "dense"
    ) -> list[list[tuple[str, float]]]:
        """For each query, up to ``k`` (document id, score) pairs, best first.

        A document scores as its best chunk. Hybrid fuses the dense and the
        lexical document rankings by reciprocal rank. Judgments are per
        document, so this is what evaluation ranks.
        """
        mode = check_mode(mode)
        if not queries:
            return []
        # Several chunks of one document can rank together; dig deep enough to
        # still find k distinct documents.
        depth = min(max(len(self._chunk_document), 1), max(k * 10, 1000))
        dense: list[list[tuple[str, float]]] = []
        lexical: list[list[tuple[str, float]]] = []
        if mode in ("dense", "hybrid"):
            for start in range(0, len(queries), 256):
                for ranked in self._dense(queries[start : start + 256], depth):
                    dense.append(self._best_per_document(ranked, max(k, _FUSION_DEPTH)))
        if mode in ("lexical", "hybrid"):
            lexical = [
                self._best_per_document(self._lexical(q, depth), max(k, _FUSION_DEPTH))
                for q in queries
            ]
        if mode == "dense":
            return [r[:k] for r in dense]
        if mode == "lexical":
            return [r[:k] for r in lexical]
        tier = fusion_depth(self.reader.counts()[0])
        return [
            tiered_fusion([[d for d, _ in a], [d for d, _ in b]], tier, k=self.rrf_k)[:k]
            for a, b in zip(dense, lexical, strict=True)
        ]
