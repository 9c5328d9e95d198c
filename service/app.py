"""The FastAPI application factory."""

from __future__ import annotations

import logging
import math
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

import faiss
from fastapi import Depends, FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from sounding.indexer import __version__
from sounding.indexer.embedding import Embedder
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
        app.state.engine = Engine(
            settings.index_dir,
            enc,
            settings.searcher_factory(enc),
            settings.reload_check_seconds,
        )
        app.state.judgments = JudgmentStore(settings.judgments_file)
        app.state.keys = open_keys(settings)
        try:
            yield
        finally:
            app.state.engine.close()
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
