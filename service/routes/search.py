"""``POST /search``: ranked passages for a query."""

from __future__ import annotations

import logging
import time

from fastapi import APIRouter, HTTPException, Request, Response
from sounding.indexer.errors import QueryError
from sounding.indexer.search import Timings

from ..auth import ReadCaller
from ..deps import SearcherDep, SettingsDep
from ..filters import check_query_length, search_filter
from ..metrics import record_mode
from ..schemas import ErrorResponse, Passage, SearchRequest, SearchResponse

log = logging.getLogger("sounding.service")


def timed_json(payload: str, timings: Timings) -> Response:
    """A JSON response carrying where the time went, in a Server-Timing header.

    Server-Timing (W3C Server Timing) lets a benchmark or a browser's
    developer tools read the breakdown; the same goes to the debug log.
    """
    header = ", ".join(f"{name};dur={ms:.3f}" for name, ms in timings.ms.items())
    log.debug("search stages (ms): %s", header)
    return Response(payload, media_type="application/json", headers={"Server-Timing": header})


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
) -> Response:
    """Rank passages by meaning; the best first.

    The ``Server-Timing`` header gives the milliseconds of each stage
    (encode, dense, lexical, fusion, fetch, serialise).
    """
    record_mode(request, body.mode)
    started = time.perf_counter()
    check_query_length(body.query, settings.max_query_chars)
    if body.k > settings.max_k:
        raise HTTPException(
            422, f"k={body.k} is over the limit of {settings.max_k} (setting max_k)"
        )
    timings = Timings()
    try:
        hits = searcher.search(
            body.query,
            body.k,
            mode=body.mode,
            max_per_document=body.max_per_document,
            rerank=body.rerank,
            where=search_filter(caller, body),
            timings=timings,
        )
    except QueryError as exc:
        raise HTTPException(422, str(exc)) from exc
    with timings.stage("serialise"):
        payload = SearchResponse(
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
        ).model_dump_json()
    return timed_json(payload, timings)
