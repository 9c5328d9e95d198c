"""What ``/search`` and ``GET /documents/{id}`` show a reader beyond the stored rows:
links to the original pages, the query's words to highlight, a document's text once.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import asdict
from typing import Any

from sounding.indexer.display import document_sections, link, shown_source
from sounding.indexer.grounding import Context
from sounding.indexer.highlight import highlights
from sounding.indexer.search import Hit
from sounding.indexer.store import ChunkRecord, DocumentRecord

from .schemas import (
    ChunkOut,
    ChunkSpanOut,
    ContextPassageOut,
    DocumentResponse,
    Passage,
    SectionOut,
)


def _web(value: Any) -> str | None:
    """``value`` when it is an http(s) URL (a pushed page's wiki address), else None."""
    if isinstance(value, str) and value.startswith(("https://", "http://")):
        return value
    return None


def original_url(
    urls: Mapping[str, str], collection: str, source: str, metadata: Mapping[str, Any] | None = None
) -> str | None:
    """Where people read a document: its collection's base URL with its path (setting
    ``collection_urls``), else its own ``url`` (front matter), else a web-address source."""
    return link(urls.get(collection), source) or _web((metadata or {}).get("url")) or _web(source)


def passages(hits: Sequence[Hit], query: str, urls: Mapping[str, str]) -> list[Passage]:
    """The response rows of ranked ``hits``: with the link to each original and the
    query's words to highlight in each text."""
    marks = highlights(query, [h.text for h in hits])
    return [
        Passage.model_validate(
            {
                **asdict(h),
                "url": original_url(urls, h.collection, h.source),
                "highlights": spans,
            }
        )
        for h, spans in zip(hits, marks, strict=True)
    ]


def document_view(
    doc: DocumentRecord,
    chunks: Sequence[ChunkRecord],
    urls: Mapping[str, str],
    query: str | None = None,
    overlap_tokens: int | None = None,
) -> DocumentResponse:
    """``GET /documents/{id}``: the stored fields and chunks, the source as readers see
    it, the link to the original, and the text once by section (with ``query``'s words
    to highlight; ``overlap_tokens``: the index's chunk overlap)."""
    source = shown_source(doc.id, doc.source)
    sections = document_sections(chunks, overlap_tokens)
    marks = highlights(query, [s.text for s in sections]) if query else [[] for _ in sections]
    return DocumentResponse(
        **{**asdict(doc), "source": source},
        url=original_url(urls, doc.collection, source, doc.metadata),
        chunks=[ChunkOut.model_validate(c, from_attributes=True) for c in chunks],
        sections=[
            SectionOut(
                trail=list(s.trail),
                page=s.page,
                text=s.text,
                chunks=[ChunkSpanOut(**asdict(span)) for span in s.chunks],
                highlights=spans,
            )
            for s, spans in zip(sections, marks, strict=True)
        ],
    )


def context_passages(chosen: Context) -> list[ContextPassageOut]:
    """The cited passages of a context block, as ``POST /context`` and the MCP tool give them."""
    return [
        ContextPassageOut(
            number=p.number,
            document_id=p.citation.document_id,
            chunk_ids=list(p.chunk_ids),
            title=p.citation.title,
            source=p.citation.source,
            trail=list(p.citation.trail),
            page=p.citation.page,
            text=p.text,
            citation=p.citation.line(),
            score=p.score,
            truncated=p.truncated,
        )
        for p in chosen.passages
    ]
