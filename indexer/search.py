"""Ranking over a loaded index: queries in, ranked passages out."""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

from .embedding import Embedder, describe
from .errors import QueryError
from .store import IndexReader, check_model


@dataclass(frozen=True)
class Hit:
    """One ranked passage."""

    rank: int
    score: float
    chunk_id: int
    document_id: str
    collection: str
    title: str
    source: str
    trail: tuple[str, ...]
    text: str
    page: int | None


class Searcher:
    """Answers queries against one :class:`IndexReader` with one encoder."""

    def __init__(self, reader: IndexReader, embedder: Embedder) -> None:
        check_model(reader.manifest, describe(embedder), reader.index_dir)
        self.reader = reader
        self.embedder = embedder

    @cached_property
    def _chunk_document(self) -> dict[int, str]:
        """Chunk id -> document id for the whole index (for document rankings)."""
        rows = self.reader._conn().execute("SELECT id, document_id FROM chunks")
        return {int(r[0]): r[1] for r in rows}

    def search(
        self, query: str, k: int = 10, *, max_per_document: int | None = None
    ) -> list[Hit]:
        """The ``k`` passages most similar to ``query``, best first."""
        query = query.strip()
        if not query:
            raise QueryError("the query is empty; send some words to search for")
        if k < 1:
            raise QueryError(f"k={k} must be 1 or more")
        # Ask FAISS for more than k when passages per document are capped.
        depth = k if max_per_document is None else k * 4 + 32
        D, I = self.reader.search(self.embedder.encode([query]), depth)
        ids = [int(i) for i in I[0] if i >= 0]
        chunks = self.reader.chunks(ids)
        docs = self.reader.documents(c.document_id for c in chunks.values())
        hits: list[Hit] = []
        per_doc: dict[str, int] = {}
        for score, cid in zip(D[0], I[0], strict=True):
            chunk = chunks.get(int(cid))
            doc = docs.get(chunk.document_id) if chunk else None
            if chunk is None or doc is None:
                continue  # removed after this generation's vectors were written
            if max_per_document is not None:
                if per_doc.get(doc.id, 0) >= max_per_document:
                    continue
                per_doc[doc.id] = per_doc.get(doc.id, 0) + 1
            hits.append(
                Hit(
                    rank=len(hits) + 1,
                    score=float(score),
                    chunk_id=chunk.id,
                    document_id=doc.id,
                    collection=doc.collection,
                    title=doc.title,
                    source=doc.source,
                    trail=chunk.trail,
                    text=chunk.text,
                    page=chunk.page,
                )
            )
            if len(hits) == k:
                break
        return hits

    def rank_documents(self, queries: list[str], k: int = 100) -> list[list[tuple[str, float]]]:
        """For each query, up to ``k`` documents scored by their best chunk.

        Used by evaluation, where judgments are per document.
        """
        if not queries:
            return []
        vectors = self.embedder.encode(queries)
        chunk_doc = self._chunk_document
        n = len(chunk_doc)
        # Several chunks of one document can rank together; dig deep enough to
        # still find k distinct documents.
        depth = min(n, max(k * 10, 1000))
        D, I = self.reader.search(vectors, depth)
        out: list[list[tuple[str, float]]] = []
        for scores, ids in zip(D, I, strict=True):
            best: dict[str, float] = {}
            for s, cid in zip(scores.tolist(), ids.tolist(), strict=True):
                doc = chunk_doc.get(cid)
                if doc is not None and doc not in best:
                    best[doc] = s
                    if len(best) == k:
                        break
            out.append(list(best.items()))
        return out
