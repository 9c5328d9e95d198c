"""Request and response bodies of the REST API."""

from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field


class SearchRequest(BaseModel):
    """A query for ranked passages."""

    model_config = ConfigDict(extra="forbid")

    query: str = Field(..., min_length=1, description="What to look for, in plain words.")
    k: int = Field(10, ge=1, description="How many passages to return (at most the max_k setting).")
    max_per_document: int | None = Field(
        None, ge=1, description="Most passages from any one document; no cap when left out."
    )
    rerank: bool | None = Field(
        None,
        description="Re-rank the top candidates with the configured cross-encoder; by "
        "default on when one is configured. true without one configured is a 422.",
    )
    mode: Literal["dense", "lexical", "hybrid"] = Field(
        "hybrid",
        description="dense: meaning (encoder vectors); lexical: words (BM25); "
        "hybrid: both, fused by reciprocal rank.",
    )


class Passage(BaseModel):
    """One ranked passage and where it comes from."""

    rank: int
    score: float = Field(
        description="dense: cosine similarity (-1 to 1); lexical: BM25; hybrid: fused "
        "reciprocal-rank score. Compare scores within one response only."
    )
    chunk_id: int
    document_id: str
    collection: str
    title: str
    source: str
    trail: list[str] = Field(description="Headings above the passage, outermost first.")
    text: str
    page: int | None = Field(None, description="1-based page, for PDFs.")


class SearchResponse(BaseModel):
    query: str
    k: int
    mode: str
    generation: int = Field(description="Index generation that answered.")
    took_ms: float = Field(description="Time spent answering, in milliseconds.")
    results: list[Passage]


class ChunkOut(BaseModel):
    chunk_id: int
    ordinal: int
    trail: list[str]
    text: str
    page: int | None
    tokens: int


class DocumentResponse(BaseModel):
    id: str
    collection: str
    title: str
    source: str
    kind: str
    modified: float = Field(description="File modification time, Unix seconds.")
    content_hash: str
    indexed_at: float
    metadata: dict[str, Any]
    chunks: list[ChunkOut]


class ModelInfo(BaseModel):
    name: str
    dimension: int
    fingerprint: str
    max_tokens: int


class HealthResponse(BaseModel):
    status: str = Field(description="'ok', or 'no-index' when no index is loaded.")
    index_loaded: bool
    generation: int | None
    documents: int
    chunks: int
    model: ModelInfo
    detail: str | None = Field(None, description="Why no index is loaded, when none is.")


class ErrorResponse(BaseModel):
    detail: str


class FeedbackRequest(BaseModel):
    """A person's (or bot's) judgment of how well a result answered a query."""

    model_config = ConfigDict(extra="forbid")

    query: str = Field(..., min_length=1, max_length=2000)
    document_id: str | None = Field(None, min_length=1, max_length=1000)
    chunk_id: int | None = Field(
        None, ge=0, le=2**63 - 1, description="A passage; its document is judged."
    )
    grade: int = Field(..., ge=0, le=3, description="0 not relevant … 3 answers it fully.")
    user: str | None = Field(None, max_length=200)


class FeedbackResponse(BaseModel):
    id: int
    query_id: str
    document_id: str
    grade: int
