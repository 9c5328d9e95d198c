"""FastAPI dependencies: what a route uses, taken from the app state.

A request that reads the index holds one :class:`~service.engine.Generation`
for its whole duration (FastAPI caches a dependency per request, so the
reader and the searcher a route takes come from the same generation) and
releases it when the request is done.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Annotated

from fastapi import Depends, HTTPException, Request
from sounding.indexer.judgments import JudgmentStore
from sounding.indexer.search import Searcher
from sounding.indexer.store import IndexReader

from .engine import Engine, Generation
from .metrics import ServiceMetrics
from .settings import ServiceSettings


def get_settings(request: Request) -> ServiceSettings:
    return request.app.state.settings


def get_engine(request: Request) -> Engine:
    return request.app.state.engine


def get_judgments(request: Request) -> JudgmentStore:
    return request.app.state.judgments


def get_metrics(request: Request) -> ServiceMetrics:
    return request.app.state.metrics


def held_generation_or_none(request: Request) -> Iterator[Generation | None]:
    """The newest generation, held until the request is done; None when no index is loaded."""
    engine: Engine | None = getattr(request.app.state, "engine", None)
    generation = engine.hold() if engine is not None else None
    try:
        yield generation
    finally:
        if generation is not None:
            generation.release()


# Released when the route function returns, before the answer is sent: the answer is
# built by then, and the access line (written after sending) is not held up by it.
MaybeGenerationDep = Annotated[
    Generation | None, Depends(held_generation_or_none, scope="function")
]


def held_generation(request: Request, generation: MaybeGenerationDep) -> Generation:
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


def get_reader(generation: GenerationDep) -> IndexReader:
    """The reader of the request's generation (503 when no index is loaded)."""
    return generation.reader


def get_searcher(generation: GenerationDep) -> Searcher:
    """The searcher of the request's generation (503 when no index is loaded)."""
    return generation.searcher


SettingsDep = Annotated[ServiceSettings, Depends(get_settings)]
EngineDep = Annotated[Engine, Depends(get_engine)]
JudgmentsDep = Annotated[JudgmentStore, Depends(get_judgments)]
MetricsDep = Annotated[ServiceMetrics, Depends(get_metrics)]
ReaderDep = Annotated[IndexReader, Depends(get_reader)]
SearcherDep = Annotated[Searcher, Depends(get_searcher)]
