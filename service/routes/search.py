"""``POST /search``: ranked passages for a query."""

from __future__ import annotations

import logging
import time

from fastapi import APIRouter, Request, Response
from sounding.indexer.search import Timings

from ..auth import ReadCaller
from ..deps import GenerationDep, SettingsDep
from ..filters import search_filter
from ..metrics import record_mode
from ..schemas import ErrorResponse, SearchRequest, SearchResponse
from ..views import passages

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
    generation: GenerationDep,
    settings: SettingsDep,
    caller: ReadCaller,
) -> Response:
    """Rank passages by meaning; the best first.

    The ``Server-Timing`` header gives the milliseconds of each stage
    (encode, dense, lexical, fusion, fetch, serialise).
    """
    record_mode(request, body.mode)
    started = time.perf_counter()
    # A QueryError here is the app's 422, with its reason.
    searcher = generation.searcher
    query = searcher.query(
        body.query,
        body.k,
        mode=body.mode,
        max_per_document=body.max_per_document,
        rerank=body.rerank,
        where=search_filter(caller, body),
        max_k=settings.max_k,
        max_query_chars=settings.max_query_chars,
    )
    timings = Timings()
    hits = searcher.run(query, timings)
    with timings.stage("serialise"):
        payload = SearchResponse(
            query=body.query,
            k=body.k,
            mode=body.mode,
            generation=generation.number,
            elapsed_ms=round((time.perf_counter() - started) * 1000, 3),
            results=passages(hits, body.query, settings.collection_urls),
        ).model_dump_json()
    return timed_json(payload, timings)
