"""``GET /health``: is an index loaded, how big, which model."""

from __future__ import annotations

from fastapi import APIRouter
from sounding.indexer.embedding import describe
from sounding.indexer.search import SearchFilter

from ..deps import EngineDep, MaybeGenerationDep
from ..schemas import HealthResponse, ModelInfo

router = APIRouter(tags=["health"])


@router.get("/health", response_model=HealthResponse)
def health(engine: EngineDep, generation: MaybeGenerationDep) -> HealthResponse:
    """Whether an index is loaded, its size and the encoder in use. Needs no key.

    The counts are of unrestricted documents only, since anyone may ask;
    ``GET /metrics`` (with a key) gives the totals.
    """
    model = ModelInfo(**describe(engine.embedder))  # type: ignore[arg-type]
    if generation is None:
        return HealthResponse(
            status="no-index",
            index_loaded=False,
            generation=None,
            documents=0,
            chunks=0,
            model=model,
            detail=engine.error,
        )
    docs, chunks = generation.reader.visible_counts(SearchFilter(groups=frozenset()))
    return HealthResponse(
        status="ok",
        index_loaded=True,
        generation=generation.number,
        documents=docs,
        chunks=chunks,
        model=model,
    )
