"""``POST /search``: ranked passages for a query."""

from __future__ import annotations

import time

from fastapi import APIRouter, HTTPException, Request

from indexer.errors import QueryError

from ..auth import ReadCaller
from ..deps import SearcherDep, SettingsDep
from ..filters import search_filter
from ..metrics import record_mode
from ..schemas import ErrorResponse, Passage, SearchRequest, SearchResponse

router = APIRouter(tags=["search"])


@router.post(
    "/search",
    response_model=SearchResponse,
    responses={422: {"model": ErrorResponse}, 503: {"model": ErrorResponse}},
)
def search(
    body: SearchRequest,
    request: Request,
    searcher: SearcherDep,
    settings: SettingsDep,
    caller: ReadCaller,
) -> SearchResponse:
    """Rank passages by meaning; the best first."""
    record_mode(request, body.mode)
    started = time.perf_counter()
    if len(body.query) > settings.max_query_chars:
        raise HTTPException(
            422,
            f"query is {len(body.query)} characters, over the limit of "
            f"{settings.max_query_chars} (setting max_query_chars)",
        )
    if body.k > settings.max_k:
        raise HTTPException(
            422, f"k={body.k} is over the limit of {settings.max_k} (setting max_k)"
        )
    try:
        hits = searcher.search(
            body.query, body.k, mode=body.mode, max_per_document=body.max_per_document,
            rerank=body.rerank, where=search_filter(caller, body),
        )
    except QueryError as exc:
        raise HTTPException(422, str(exc)) from exc
    return SearchResponse(
        query=body.query,
        k=body.k,
        mode=body.mode,
        generation=searcher.reader.generation,
        took_ms=round((time.perf_counter() - started) * 1000, 3),
        results=[
            Passage(
                rank=h.rank,
                score=h.score,
                chunk_id=h.chunk_id,
                document_id=h.document_id,
                collection=h.collection,
                title=h.title,
                source=h.source,
                trail=list(h.trail),
                text=h.text,
                page=h.page,
            )
            for h in hits
        ],
    )
