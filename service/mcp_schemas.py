"""What sounding's MCP tools take and give: argument and result models, and their
JSON Schemas as the tool list advertises them (:func:`tool_list`)."""

from __future__ import annotations

import mcp_types as types
from pydantic import BaseModel, ConfigDict, Field
from sounding.indexer.query import MODES

from .filters import FilterFields
from .schemas import ContextPassageOut, Passage

DEFAULT_DOCUMENT_CHARS = 20_000


# -- arguments --------------------------------------------------------------------------
# k, mode and budget are checked by make_query and the budget rule, not by pydantic, so a
# tool error carries the same reason as the REST API's QueryError; the schema still
# advertises the bounds to the assistant.


class SearchArgs(FilterFields):
    """Arguments of ``search``."""

    model_config = ConfigDict(extra="forbid", title="search")

    query: str = Field(..., description="What to look for, in plain words.")
    k: int = Field(
        10,
        description="How many passages to return (at most the service's max_k, 100 by default).",
        json_schema_extra={"minimum": 1},
    )
    mode: str = Field(
        "hybrid",
        description="dense: meaning (encoder vectors); lexical: words (BM25); "
        "hybrid: both, fused by reciprocal rank.",
        json_schema_extra={"enum": list(MODES)},
    )
    max_per_document: int | None = Field(
        None, ge=1, description="Most passages from any one document; no cap when left out."
    )


class ContextArgs(FilterFields):
    """Arguments of ``context``."""

    model_config = ConfigDict(extra="forbid", title="context")

    query: str = Field(..., description="What the passages should answer.")
    budget: int = Field(
        1000,
        description="Most encoder tokens the whole block may take: passages, their [n] "
        "numbers, citation lines and blank lines (at most the service's max_context_tokens).",
        json_schema_extra={"minimum": 1},
    )
    mode: str = Field(
        "hybrid", description="Ranking, as for search.", json_schema_extra={"enum": list(MODES)}
    )
    max_per_document: int = Field(
        2, ge=1, le=20, description="Most passages from any one document."
    )


class DocumentArgs(BaseModel):
    """Arguments of ``get_document``."""

    model_config = ConfigDict(extra="forbid", title="get_document")

    id: str = Field(
        ...,
        min_length=1,
        max_length=1000,
        description="The document's id as search and context give it (document_id), "
        "e.g. runbooks/restart.md.",
    )
    max_chars: int = Field(
        DEFAULT_DOCUMENT_CHARS,
        ge=1,
        le=1_000_000,
        description="Longest text returned; a longer document is cut at a word and marked "
        "truncated.",
    )


# -- results ----------------------------------------------------------------------------


class CitedPassage(Passage):
    citation: str = Field(description="Where it comes from, as the context tool cites it.")


class SearchResult(BaseModel):
    query: str
    mode: str
    generation: int = Field(description="Index generation that answered.")
    results: list[CitedPassage]


class ContextResult(BaseModel):
    query: str
    budget: int
    used: int = Field(description="Tokens the block takes; never over budget.")
    mode: str
    generation: int
    passages: list[ContextPassageOut]
    text: str = Field(description="The numbered, cited block, as POST /context gives it.")


class DocumentResult(BaseModel):
    id: str
    collection: str
    title: str
    source: str
    url: str | None = Field(None, description="Where people read the original, if known.")
    kind: str
    modified: float = Field(description="Modification time, Unix seconds.")
    tags: list[str]
    citation: str
    text: str = Field(description="The document's text, sections headed by their headings.")
    truncated: bool = Field(description="Cut at max_chars (the text ends with ' …').")


TOOLS: dict[str, tuple[type[BaseModel], type[BaseModel], str]] = {
    "search": (
        SearchArgs,
        SearchResult,
        "Search the team's indexed documents by meaning and words. Returns the best "
        "passages, each as '[n] text' followed by a 'Source:' citation line (title, "
        "headings, page, where the document lives). Use it to find where something is "
        "written; quote the citation when you use a passage.",
    ),
    "context": (
        ContextArgs,
        ContextResult,
        "Get grounding for an answer: the passages that best answer the question, "
        "numbered [1], [2], … with a 'Source:' citation line each, cut to fit a budget "
        "of tokens. Paste the text into your reasoning and cite the numbers.",
    ),
    "get_document": (
        DocumentArgs,
        DocumentResult,
        "Read one whole document by its id (the document_id a search or context result "
        "gives), when a passage is not enough.",
    ),
}


def tool_list() -> list[types.Tool]:
    """The tools with their input and output schemas (pydantic's JSON Schema)."""
    return [
        types.Tool(
            name=name,
            description=description,
            input_schema=args.model_json_schema(),
            output_schema=result.model_json_schema(),
            annotations=types.ToolAnnotations(
                read_only_hint=True, destructive_hint=False, open_world_hint=False
            ),
        )
        for name, (args, result, description) in TOOLS.items()
    ]
