"""FastAPI dependencies: what a route uses, taken from the app state.

A request that reads the index holds one :class:`~service.engine.Generation`
for its whole duration (FastAPI caches a dependency per request, so the
reader and the searcher a route takes come from the same generation) and
releases it when the request is done.

The dependencies are ``async`` on purpose: FastAPI runs a plain function in its
thread pool, one hop there and back per dependency, which cost about a millisecond
each on a busy 2-core machine (tests/bench/latency.py, "other"). Only loading a new
generation, which reads files, still goes to the thread pool.
"""

from __future__ import annotations

from collections.abc import AsyncIterator
from typing import Annotated

from fastapi import Depends, HTTPException, Request
from sounding.indexer.judgments import JudgmentStore
from sounding.indexer.search import Searcher
from sounding.indexer.store import IndexReader
from starlette.concurrency import run_in_threadpool

from .engine import Engine, Generation
from .metrics import ServiceMetrics
from .settings import ServiceSettings


async def get_settings(request: Request) -> ServiceSettings:
    return request.app.state.settings


async def get_engine(request: Request) -> Engine:
    return request.app.state.engine


async def get_judgments(request: Request) -> JudgmentStore:
    return request.app.state.judgments


async def get_metrics(request: Request) -> ServiceMetrics:
    return request.app.state.metrics


async def held_generation_or_none(request: Request) -> AsyncIterator[Generation | None]:
    """The newest generation, held until the request is done; None when no index is loaded."""
    engine: Engine | None = getattr(request.app.state, "engine", None)
    if engine is None:
        yield None
        return
    engine.count_request(1)  # the query batcher waits for a fuller batch only while others run
    try:
        # A due check for a newer generation may load one (files, seconds): not in the loop.
        generation = (
            await run_in_threadpool(engine.hold) if engine.refresh_due() else (engine.hold())
        )
        try:
            yield generation
        finally:
            if generation is not None:
                generation.release()
    finally:
        engine.count_request(-1)


# Released when the route function returns, before the answer is sent: the answer is
# built by then, and the access line (written after sending) is not held up by it.
MaybeGenerationDep = Annotated[
    Generation | None, Depends(held_generation_or_none, scope="function")
]


async def held_generation(request: Request, generation: MaybeGenerationDep) -> Generation:
    """The held generation, or 503 with the reason when no index is loaded."""
    if generation is None:
        engine: Engine | None = getattr(request.app.state, "engine", None)
        reason = (engine.error if engine is not None else None) or "unknown reason"
        raise HTTPException(
            status_code=503,
            detail=f"no index is loaded: {reason}; build one with `sounding index PATH`",
        )
    return generation


GenerationDep = Annotated[Generation, Depends(held_generation)]


async def get_reader(generation: GenerationDep) -> IndexReader:
    """The reader of the request's generation (503 when no index is loaded)."""
    return generation.reader


async def get_searcher(generation: GenerationDep) -> Searcher:
    """The searcher of the request's generation (503 when no index is loaded)."""
    return generation.searcher


SettingsDep = Annotated[ServiceSettings, Depends(get_settings)]
EngineDep = Annotated[Engine, Depends(get_engine)]
JudgmentsDep = Annotated[JudgmentStore, Depends(get_judgments)]
MetricsDep = Annotated[ServiceMetrics, Depends(get_metrics)]
ReaderDep = Annotated[IndexReader, Depends(get_reader)]
SearcherDep = Annotated[Searcher, Depends(get_searcher)]
