"""What a search asks for: the ranking modes, and one validated query value.

Every entry point (the service's routes, the command line, evaluation) names
modes through :data:`Mode` and builds a :class:`Query` with :func:`make_query`,
so the rules and their messages live here once.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal, get_args

from .errors import QueryError
from .selection import SearchFilter

__all__ = ["MODES", "Mode", "Query", "check_mode", "make_query"]

Mode = Literal["dense", "lexical", "hybrid"]
"""dense: encoder vectors (FAISS); lexical: BM25 (FTS5); hybrid: both fused by rank."""
MODES: tuple[Mode, ...] = get_args(Mode)
DEFAULT_MODE: Mode = "hybrid"


def check_mode(mode: str) -> Mode:
    """``mode`` if it is one of MODES, else QueryError naming the choices."""
    if mode not in MODES:
        raise QueryError(f"mode={mode!r} is not one of {', '.join(MODES)}")
    return mode


@dataclass(frozen=True)
class Query:
    """A search that passed :func:`make_query`; searchers run it without checking again.

    ``text`` is stripped; ``where`` restricts the documents searched (None:
    all); ``rerank`` None means "when a reranker is configured".
    """

    text: str
    k: int = 10
    mode: Mode = DEFAULT_MODE
    max_per_document: int | None = None
    rerank: bool | None = None
    where: SearchFilter | None = None


def make_query(
    text: str,
    k: int = 10,
    *,
    mode: str = DEFAULT_MODE,
    max_per_document: int | None = None,
    rerank: bool | None = None,
    where: SearchFilter | None = None,
    can_rerank: bool = True,
    max_k: int | None = None,
    max_query_chars: int | None = None,
) -> Query:
    """The one check of a search request; QueryError (a 422 in the service) says what is wrong.

    ``can_rerank`` says whether the searcher that will run it has a reranker;
    ``max_k`` and ``max_query_chars`` are the service's limits (None: no limit).
    """
    # Checked in this order so a request breaking several rules hears the same reason as before.
    if max_query_chars is not None and len(text) > max_query_chars:
        raise QueryError(
            f"query is {len(text)} characters, over the limit of {max_query_chars} "
            "(setting max_query_chars)"
        )
    if max_k is not None and k > max_k:
        raise QueryError(f"k={k} is over the limit of {max_k} (setting max_k)")
    checked_mode = check_mode(mode)
    stripped = text.strip()
    if not stripped:
        raise QueryError("the query is empty; send some words to search for")
    if k < 1:
        raise QueryError(f"k={k} must be 1 or more")
    if rerank and not can_rerank:
        raise QueryError(
            "rerank was asked for but no reranker is configured (setting reranker_path)"
        )
    return Query(stripped, k, checked_mode, max_per_document, rerank, where)
