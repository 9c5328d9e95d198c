"""``POST /context``: cited passages that fit a chat bot's prompt budget."""

from __future__ import annotations

import time
from collections.abc import Sequence

from fastapi import APIRouter, Request
from sounding.indexer.errors import QueryError
from sounding.indexer.grounding import Context, Counter, select_context, token_counter
from sounding.indexer.search import Hit, Query, Searcher
from sounding.indexer.selection import SearchFilter
from sounding.indexer.store import IndexReader

from ..auth import ReadCaller
from ..deps import GenerationDep, SettingsDep
from ..filters import search_filter
from ..metrics import record_mode
from ..schemas import ContextRequest, ContextResponse, ErrorResponse
from ..settings import ServiceSettings
from ..views import context_passages

router = APIRouter(tags=["context"])

# Candidates ranked before selection: enough to fill a large budget after the per-document
# cap and the skips, few enough that counting them stays cheap.
MIN_POOL, MAX_POOL = 32, 100
# Roughly four characters per word piece for English text (common practice; a figure from
# memory), used only to size the candidate pool of a budget in characters.
CHARS_PER_TOKEN = 4
# Hits of one document in the pool, at least.
PER_DOCUMENT_POOL = 8


# Section continuation: the following windows of the best hits are candidates right after
# them (see indexer/grounding.py). Three hits, eight windows each: a procedure of several
# steps fits, and a few small reads per request stay cheap beside the encoder.
CONTINUE_TOP, CONTINUE_SPAN = 3, 8


def following_windows(
    reader: IndexReader,
    hits: Sequence[Hit],
    where: SearchFilter | None,
    top: int = CONTINUE_TOP,
    span: int = CONTINUE_SPAN,
) -> dict[int, list[Hit]]:
    """For each of the ``top`` best hits, the next ``span`` windows of its document, in
    order, scored as the hit (the same filter applies: it is the same document)."""
    return {
        hit.chunk_id: [
            Hit.of(row, hit.rank, hit.score)
            for row in reader.ordinal_rows(
                hit.document_id, hit.ordinal + 1, hit.ordinal + span, where
            )
        ]
        for hit in hits[:top]
    }


def ground(
    searcher: Searcher,
    query: Query,
    budget: int,
    count: Counter,
    max_per_document: int,
    *,
    continuation: bool = True,
) -> Context:
    """The context block of a checked ``query`` (what the route returns; benches call it)."""
    hits = searcher.run(query)
    following = following_windows(searcher.reader, hits, query.where) if continuation else None
    return select_context(
        hits, budget, count, max_per_document=max_per_document, following=following
    )


def check_budget(budget: int, unit: str, settings: ServiceSettings) -> None:
    """QueryError (the app's 422) when ``budget`` is over the settings' limit for ``unit``."""
    limit, setting = (
        (settings.max_context_tokens, "max_context_tokens")
        if unit == "tokens"
        else (settings.max_context_chars, "max_context_chars")
    )
    if budget > limit:
        raise QueryError(f"budget={budget} {unit} is over the limit of {limit} (setting {setting})")


def candidate_pool(budget: int, unit: str) -> int:
    """How many hits to rank for a budget: about two per chunk-sized share of it."""
    tokens = budget if unit == "tokens" else budget // CHARS_PER_TOKEN
    return min(MAX_POOL, max(MIN_POOL, tokens // 64))


@router.post(
    "/context",
    response_model=ContextResponse,
    responses={422: {"model": ErrorResponse}, 503: {"model": ErrorResponse}},
)
def context(
    body: ContextRequest,
    request: Request,
    generation: GenerationDep,
    settings: SettingsDep,
    caller: ReadCaller,
) -> ContextResponse:
    """The best passages for a query whose numbered, cited text block fits ``budget``."""
    record_mode(request, body.mode)
    started = time.perf_counter()
    searcher = generation.searcher
    # A QueryError here is the app's 422, with its reason.
    query = searcher.query(
        body.query,
        candidate_pool(body.budget, body.unit),
        mode=body.mode,
        # Loose, so adjacent windows of one document can join into one passage, yet
        # one long document cannot fill the whole pool.
        max_per_document=max(PER_DOCUMENT_POOL, 4 * body.max_per_document),
        rerank=body.rerank,
        where=search_filter(caller, body),
        max_query_chars=settings.max_query_chars,
    )
    check_budget(body.budget, body.unit, settings)
    count = token_counter(searcher.embedder.tokenizer) if body.unit == "tokens" else len
    chosen = ground(searcher, query, body.budget, count, body.max_per_document)
    return ContextResponse(
        query=body.query,
        budget=body.budget,
        unit=body.unit,
        used=chosen.used,
        mode=body.mode,
        generation=generation.number,
        elapsed_ms=round((time.perf_counter() - started) * 1000, 3),
        passages=context_passages(chosen),
        text=chosen.text,
    )
