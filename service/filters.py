"""From a request's caller and filter fields to the indexer's :class:`SearchFilter`."""

from __future__ import annotations

from datetime import datetime, timezone

from pydantic import BaseModel, Field
from sounding.indexer.search import SearchFilter
from sounding.indexer.store import DocumentRecord

from .auth import Caller

_NAME = r"^[^\x00-\x1f]{1,200}$"


class FilterFields(BaseModel):
    """Optional narrowing of a search; combined with the caller's groups."""

    collections: list[str] | None = Field(
        None, max_length=50, description="Only these collections (any of them)."
    )
    tags: list[str] | None = Field(
        None,
        max_length=50,
        description="Only documents with at least one of these tags (case-insensitive).",
    )
    modified_after: datetime | None = Field(
        None,
        description="Only documents modified after this time: ISO 8601 "
        "(e.g. 2026-01-31T00:00:00Z) or Unix seconds.",
    )
    source_prefix: str | None = Field(
        None,
        min_length=1,
        max_length=1000,
        pattern=_NAME,
        description="Only documents whose source path, or id (path in the indexed folder), "
        "starts with this (case-sensitive).",
    )


def _unix(moment: datetime) -> float:
    # A time without a zone is taken as UTC, not as the server's local time.
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=timezone.utc)
    return moment.timestamp()


def caller_filter(caller: Caller) -> SearchFilter:
    """What ``caller`` may read, with no other narrowing."""
    return SearchFilter(groups=caller.groups)


def search_filter(caller: Caller, fields: FilterFields) -> SearchFilter:
    """The caller's groups plus the request's filters, as one SearchFilter."""
    return SearchFilter(
        groups=caller.groups,
        collections=tuple(fields.collections or ()),
        tags=tuple(fields.tags or ()),
        modified_after=None if fields.modified_after is None else _unix(fields.modified_after),
        source_prefix=fields.source_prefix,
    )


def readable(caller: Caller, doc: DocumentRecord | None) -> DocumentRecord | None:
    """``doc`` when the caller may read it, else None (so a route answers 404, not 403)."""
    if doc is None or not caller_filter(caller).admits(doc):
        return None
    return doc
