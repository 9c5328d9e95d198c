"""The FastAPI application factory."""

from __future__ import annotations

import logging
import math
import os
from collections.abc import AsyncIterator, Callable
from contextlib import asynccontextmanager

import faiss
from fastapi import Depends, FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from sounding.indexer import __version__
from sounding.indexer.batching import QueryBatcher
from sounding.indexer.embedding import Embedder, SentenceTransformerEmbedder, usable_cores
from sounding.indexer.errors import QueryError, SoundingError
from sounding.indexer.judgments import JudgmentStore

from .auth import open_keys, require
from .engine import Engine
from .limits import RequestLimits
from .mcp_http import router as mcp_router
from .metrics import RequestObserver, ServiceMetrics, route_template
from .routes import collections, context, documents, feedback, health, page, search
from .routes import metrics as metrics_route
from .settings import ServiceSettings

log = logging.getLogger("sounding.service")
INTERNAL_ERROR = "internal error; see the service log"


def create_app(
    settings: ServiceSettings | None = None, embedder: Embedder | None = None
) -> FastAPI:
    """Build the app. The encoder and index load once, when the app starts.

    ``embedder`` lets tests pass a seeded fake instead of the real encoder.
    """
    settings = settings or ServiceSettings()
    settings.check_access()  # no keys beyond loopback: refuse before anything starts

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        faiss.omp_set_num_threads(settings.search_threads)
        enc = (
            embedder
            if embedder is not None
            else settings.model_copy(update={"threads": settings.query_threads}).embedder()
        )
        enc.encode(["warm-up"])  # load weights now, not on the first user's query
        batcher = _query_batcher(settings, enc, lambda: app.state.engine.in_flight)
        served = batcher if batcher is not None else enc
        app.state.engine = Engine(
            settings.index_dir,
            served,
            settings.searcher_factory(served),
            settings.reload_check_seconds,
        )
        app.state.judgments = JudgmentStore(settings.judgments_file)
        app.state.keys = open_keys(settings)
        try:
            yield
        finally:
            app.state.engine.close()
            if batcher is not None:
                batcher.close()
            app.state.keys.close()
            app.state.judgments.close()

    app = FastAPI(
        title="sounding",
        version=__version__,
        summary="Meaning-based search over a team's documents, with cited passages.",
        lifespan=lifespan,
        # FastAPI's /docs and /redoc pages load their scripts from a CDN, which an
        # air-gapped network cannot reach; the schema itself stays at /openapi.json.
        docs_url=None,
        redoc_url=None,
    )
    app.state.settings = settings
    app.add_middleware(
        RequestLimits,
        max_body_bytes=settings.max_body_bytes,
        max_json_depth=settings.max_json_depth,
        max_upload_bytes=settings.max_upload_bytes,
    )
    # Added last, so outermost: request id, counts and access line for every answer,
    # RequestLimits' refusals included.
    app.state.metrics = ServiceMetrics(settings.index_dir)
    app.add_middleware(RequestObserver, metrics=app.state.metrics)
    for module in (search, context, documents, collections, feedback, health, page):
        app.include_router(module.router)
    app.include_router(mcp_router)  # MCP tools at /mcp: the same keys, limits and logs
    # Totals and latencies only (no ids, titles or text), but still for key holders.
    app.include_router(metrics_route.router, dependencies=[Depends(require("read"))])
    app.mount("/static", page.static_files(), name="static")

    @app.exception_handler(RequestValidationError)
    async def invalid_request(request: Request, exc: RequestValidationError) -> JSONResponse:
        # One readable line first, then FastAPI's usual list for programs.
        reasons = "; ".join(
            f"{'.'.join(str(p) for p in e.get('loc', ()) if p != 'body') or 'body'}: {e.get('msg')}"
            for e in exc.errors()
        )
        return JSONResponse(
            status_code=422,
            content=_plain({"detail": f"invalid request: {reasons}", "errors": exc.errors()}),
        )

    @app.exception_handler(QueryError)
    async def bad_query(request: Request, exc: QueryError) -> JSONResponse:
        return JSONResponse(status_code=422, content={"detail": str(exc)})

    @app.exception_handler(SoundingError)
    async def sounding_error(request: Request, exc: SoundingError) -> JSONResponse:
        return JSONResponse(status_code=503, content={"detail": str(exc)})

    @app.exception_handler(Exception)
    async def unexpected(request: Request, exc: Exception) -> JSONResponse:
        # A bug, not a bad request: the traceback goes to the log, never to the client.
        # The route template, never the path: a document id may name a restricted page
        # (service/logs.py: no raw paths at info level or above).
        log.error(
            "unexpected error answering %s %s",
            request.method,
            route_template(request.scope),
            exc_info=exc,
        )
        return JSONResponse(status_code=500, content={"detail": INTERNAL_ERROR})

    return app


def _query_batcher(
    settings: ServiceSettings, enc: Embedder, in_flight: Callable[[], int]
) -> QueryBatcher | None:
    """The batcher in front of the service's encoder, or None when query_batch is 1.

    A real encoder gets its torch threads set per batch: a lone query on an idle
    service uses query_idle_threads (every core), anything else query_threads.
    """
    if settings.query_batch <= 1:
        return None
    set_threads: Callable[[int], None] | None = None
    if isinstance(enc, SentenceTransformerEmbedder):
        import torch

        set_threads = torch.set_num_threads
    return QueryBatcher(
        enc,
        max_batch=settings.query_batch,
        wait_ms=settings.query_batch_wait_ms,
        in_flight=in_flight,
        set_threads=set_threads,
        idle_threads=settings.query_idle_threads or usable_cores(),
        busy_threads=settings.query_threads,
        machine_idle=_machine_idle,
    )


def _machine_idle() -> bool:
    """Whether the machine has a core to spare: the 1-minute load average (every runnable
    process, this one included) is at least half a core below the cores we may use."""
    try:
        return os.getloadavg()[0] <= usable_cores() - 0.5
    except OSError:  # pragma: no cover - no load average on this system
        return False


def _plain(errors: object) -> object:
    """Validation errors made JSON-safe: exceptions in ctx become strings, and so do
    non-finite floats; text that UTF-8 cannot encode (lone surrogates) is escaped."""
    if isinstance(errors, dict):
        return {_plain(k): _plain(v) for k, v in errors.items()}
    if isinstance(errors, list | tuple):
        return [_plain(v) for v in errors]
    if isinstance(errors, float) and not math.isfinite(errors):
        return str(errors)
    if isinstance(errors, int | float | bool) or errors is None:
        return errors
    text = str(errors)
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        return text.encode("utf-8", "backslashreplace").decode("utf-8")
    return text
