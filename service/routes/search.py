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


def timed_json(payload: str, timings: Timings, *, send: bool) -> Response:
    """A JSON response; with ``send``, where the time went, in a Server-Timing header.

    Server-Timing (W3C Server Timing) lets a benchmark or a browser's developer tools
    read the breakdown; the debug log always gets it. Only for admin keys (or with the
    timing_header setting): a stage's time is a side channel on what others may read.
    """
    header = ", ".join(f"{name};dur={ms:.3f}" for name, ms in timings.ms.items())
    log.debug("search stages (ms): %s", header)
    headers = {"Server-Timing": header} if send else None
    return Response(payload, media_type="application/json", headers=headers)


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

    For admin keys (or with the ``timing_header`` setting) the ``Server-Timing``
    header gives the milliseconds of each stage (encode, dense, lexical, fusion,
    fetch, serialise).
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
    return timed_json(payload, timings, send=settings.timing_header or caller.may("admin"))
