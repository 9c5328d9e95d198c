"""``GET /documents/{id}``: one document's metadata and chunks."""

from __future__ import annotations

from fastapi import APIRouter, HTTPException

from ..deps import SearcherDep
from ..schemas import ChunkOut, DocumentResponse, ErrorResponse

router = APIRouter(tags=["documents"])


@router.get(
    "/documents/{document_id:path}",
    response_model=DocumentResponse,
    responses={404: {"model": ErrorResponse}, 503: {"model": ErrorResponse}},
)
def get_document(document_id: str, searcher: SearcherDep) -> DocumentResponse:
    """A document by id (its path relative to the indexed folder, or its corpus ``_id``)."""
    reader = searcher.reader
    doc = reader.document(document_id)
    if doc is None:
        raise HTTPException(404, f"no document with id {document_id!r} in the index")
    return DocumentResponse(
        id=doc.id,
        collection=doc.collection,
        title=doc.title,
        source=doc.source,
        kind=doc.kind,
        modified=doc.modified,
        content_hash=doc.content_hash,
        indexed_at=doc.indexed_at,
        metadata=doc.metadata,
        chunks=[
            ChunkOut(
                chunk_id=c.id,
                ordinal=c.ordinal,
                trail=list(c.trail),
                text=c.text,
                page=c.page,
                tokens=c.tokens,
            )
            for c in reader.document_chunks(doc.id)
        ],
    )
