"""``GET /health``: is an index loaded, how big, which model."""

from __future__ import annotations

from fastapi import APIRouter

from indexer.embedding import describe

from ..deps import EngineDep
from ..schemas import HealthResponse, ModelInfo

router = APIRouter(tags=["health"])


@router.get("/health", response_model=HealthResponse)
def health(engine: EngineDep) -> HealthResponse:
    """Whether an index is loaded, its size and the encoder in use."""
    searcher = engine.current()
    model = ModelInfo(**describe(engine.embedder))  # type: ignore[arg-type]
    if searcher is None:
        return HealthResponse(
            status="no-index", index_loaded=False, generation=None, documents=0, chunks=0,
            model=model, detail=engine.error,
        )
    docs, chunks = searcher.reader.counts()
    return HealthResponse(
        status="ok", index_loaded=True, generation=searcher.reader.generation,
        documents=docs, chunks=chunks, model=model,
    )
