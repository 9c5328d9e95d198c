"""Request and response bodies of the REST API."""

from __future__ import annotations

from typing import Any, Literal

from pydantic import AliasChoices, BaseModel, ConfigDict, Field
from sounding.indexer.query import Mode

from .filters import FilterFields


class SearchRequest(FilterFields):
    """A query for ranked passages, optionally narrowed by collection, tags, time or path."""

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
    mode: Mode = Field(
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
    modified: float = Field(0.0, description="The document's modification time, Unix seconds.")
    tags: list[str] = Field(default_factory=list, description="The document's tags.")
    url: str | None = Field(
        None,
        description="Where people read the original: the collection's address (setting "
        "collection_urls) with the document's path, or the source when it is a web address.",
    )
    highlights: list[tuple[int, int]] = Field(
        default_factory=list,
        description="[start, end) character spans of text holding the query's words, "
        "whole tokens matched as the lexical ranking matches them (folded, stemmed).",
    )


class SearchResponse(BaseModel):
    query: str
    k: int
    mode: str
    generation: int = Field(description="Index generation that answered.")
    elapsed_ms: float = Field(description="Time spent answering, in milliseconds.")
    results: list[Passage]


class ChunkOut(BaseModel):
    # Built from the reader's chunk records, whose id is ``id``.
    chunk_id: int = Field(validation_alias=AliasChoices("chunk_id", "id"))
    ordinal: int
    trail: list[str]
    text: str
    page: int | None
    tokens: int


class ChunkSpanOut(BaseModel):
    chunk_id: int
    start: int = Field(description="Where the chunk's text starts in the section's text.")
    end: int = Field(description="Where it ends (exclusive).")


class SectionOut(BaseModel):
    trail: list[str] = Field(description="Headings above this text, outermost first.")
    page: int | None = Field(None, description="1-based page, for PDFs.")
    text: str
    chunks: list[ChunkSpanOut]
    highlights: list[tuple[int, int]] = Field(
        default_factory=list,
        description="Spans of text holding the words of the request's `highlight` query.",
    )


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
    groups: list[str] = Field(description="Groups that may read it; empty: everyone.")
    tags: list[str]
    chunks: list[ChunkOut] = Field(
        description="The stored windows, in order; consecutive ones repeat their overlap."
    )
    url: str | None = Field(
        None,
        description="Where people read the original: the collection's address (setting "
        "collection_urls) with the document's path, its own url (front matter), or the "
        "source when it is a web address.",
    )
    sections: list[SectionOut] = Field(
        default_factory=list,
        description="The document's text once (overlapping windows joined), by heading "
        "trail and page, with each chunk's span: what a reader of the whole page sees.",
    )


class ModelInfo(BaseModel):
    name: str
    dimension: int
    fingerprint: str
    max_tokens: int


class HealthResponse(BaseModel):
    status: str = Field(description="'ok', or 'no-index' when no index is loaded.")
    index_loaded: bool
    generation: int | None
    documents: int = Field(description="Unrestricted documents (anyone may ask /health).")
    chunks: int = Field(description="Chunks of the unrestricted documents.")
    model: ModelInfo
    detail: str | None = Field(None, description="Why no index is loaded, when none is.")


class ErrorResponse(BaseModel):
    detail: str


class CollectionOut(BaseModel):
    name: str
    documents: int = Field(description="Documents of this collection the caller may read.")


class CollectionsResponse(BaseModel):
    collections: list[CollectionOut]


DocumentFormat = Literal["markdown", "html", "text"]


class PushRequest(BaseModel):
    """A document pushed as text (upload a file with multipart/form-data instead for PDFs)."""

    model_config = ConfigDict(extra="forbid")

    text: str = Field(..., min_length=1, description="The document's content, in `format`.")
    format: DocumentFormat = Field("markdown", description="How to read `text`.")
    title: str | None = Field(
        None,
        min_length=1,
        max_length=500,
        description="Title; by default from the text (front matter, H1).",
    )
    collection: str | None = Field(
        None,
        min_length=1,
        max_length=200,
        pattern=r"^[^\x00-\x1f/]+$",
        description="Collection; by default the push_collection setting ('pushed').",
    )
    groups: list[str] | None = Field(
        None,
        max_length=100,
        description="Groups that may read it; by default from the front "
        "matter or the access rules, else unrestricted. [] makes it unrestricted. A key may "
        "push only what it could read itself: groups that include none of the key's are a 403.",
    )
    tags: list[str] | None = Field(None, max_length=100, description="Tags for filtering.")
    source: str | None = Field(
        None,
        min_length=1,
        max_length=2000,
        description="Where the document lives (its wiki URL, say); shown with citations.",
    )
    modified: float | None = Field(
        None, ge=0, le=1e11, description="Modification time, Unix seconds; by default now."
    )


class PushResponse(BaseModel):
    document_id: str
    action: str = Field(description="added, updated, unchanged or removed.")
    chunks: int
    chunks_embedded: int
    generation: int = Field(description="Generation that holds the change; served from now on.")
    warnings: list[str] = Field(
        default_factory=list,
        description="What a person should know about the document as indexed "
        "(invalid UTF-8 replaced, PDF pages without text, ...).",
    )


class FeedbackRequest(BaseModel):
    """A person's (or bot's) judgment of how well a result answered a query."""

    model_config = ConfigDict(extra="forbid")

    query: str = Field(..., min_length=1, max_length=2000)
    document_id: str | None = Field(None, min_length=1, max_length=1000)
    chunk_id: int | None = Field(
        None, ge=0, le=2**63 - 1, description="A passage; its document is judged."
    )
    grade: int = Field(..., ge=0, le=3, description="0 not relevant … 3 answers it fully.")
    user: str | None = Field(
        None,
        max_length=200,
        deprecated=True,
        description="Ignored: the judgment is recorded under the name of the key that sends "
        "it (see `user` in the answer). Accepted so that older clients keep working.",
    )


class FeedbackResponse(BaseModel):
    id: int
    query_id: str
    document_id: str
    grade: int
    user: str | None = Field(
        None, description="Who the judgment is recorded under: the key's name (none without keys)."
    )


class ContextRequest(FilterFields):
    """A query for grounding passages that fit a budget (``POST /context``)."""

    model_config = ConfigDict(extra="forbid")

    query: str = Field(..., min_length=1, description="What the passages should answer.")
    budget: int = Field(
        1000,
        ge=1,
        description="Most tokens (or characters, with unit=chars) the whole text block may "
        "take: passages, numbers, citations and blank lines. At most the max_context_tokens "
        "(or max_context_chars) setting.",
    )
    unit: Literal["tokens", "chars"] = Field(
        "tokens", description="tokens: word pieces of the encoder's tokenizer; chars: characters."
    )
    max_per_document: int = Field(
        2,
        ge=1,
        le=20,
        description="Most passages from any one document (adjacent windows "
        "joined into one passage count once).",
    )
    mode: Mode = Field("hybrid", description="Ranking, as for /search.")
    rerank: bool | None = Field(
        None, description="Re-rank with the configured cross-encoder, as for /search."
    )


class ContextPassageOut(BaseModel):
    """One numbered passage of the block and its citation."""

    number: int = Field(description="The [n] the passage carries in text.")
    document_id: str
    chunk_ids: list[int] = Field(description="Chunks joined into this passage, in order.")
    title: str
    source: str
    trail: list[str] = Field(description="Headings above the passage, outermost first.")
    page: int | None = Field(None, description="1-based page, for PDFs.")
    text: str
    citation: str = Field(description="The citation as written in text after 'Source: '.")
    score: float = Field(description="Best score of its chunks (as /search scores them).")
    truncated: bool = Field(False, description="Cut at a word to fit the budget (ends with ' …').")


class ContextResponse(BaseModel):
    query: str
    budget: int
    unit: str
    used: int = Field(description="Tokens (or characters) text takes; never over budget.")
    mode: str
    generation: int = Field(description="Index generation that answered.")
    elapsed_ms: float = Field(description="Time spent answering, in milliseconds.")
    passages: list[ContextPassageOut]
    text: str = Field(
        description="Ready to paste into a prompt: each passage as '[n] text', then a line "
        "'Source: title > headings, page (source)', passages separated by a blank line. "
        "Empty when nothing fits or nothing matched."
    )
