"""The records a reader returns: chunks, documents, and the rows ranked passages are made of."""

from __future__ import annotations

import json
import sqlite3
from dataclasses import dataclass
from typing import Any

from ..display import shown_source


@dataclass(frozen=True)
class ChunkRecord:
    """One stored chunk, as readers get it."""

    id: int
    document_id: str
    ordinal: int
    trail: tuple[str, ...]
    text: str
    page: int | None
    tokens: int


@dataclass(frozen=True)
class DocumentRecord:
    """One stored document, as readers get it."""

    id: str
    collection: str
    title: str
    source: str
    kind: str
    modified: float
    content_hash: str
    metadata: dict[str, Any]
    indexed_at: float
    groups: tuple[str, ...] = ()
    tags: tuple[str, ...] = ()


def chunk_record(row: sqlite3.Row) -> ChunkRecord:
    return ChunkRecord(
        id=row["id"],
        document_id=row["document_id"],
        ordinal=row["ordinal"],
        trail=tuple(json.loads(row["trail"])),
        text=row["text"],
        page=row["page"],
        tokens=row["tokens"],
    )


def document_record(row: sqlite3.Row) -> DocumentRecord:
    return DocumentRecord(
        id=row["id"],
        collection=row["collection"],
        title=row["title"],
        source=row["source"],
        kind=row["kind"],
        modified=row["modified"],
        content_hash=row["content_hash"],
        metadata=json.loads(row["metadata"]),
        indexed_at=row["indexed_at"],
        groups=tuple(json.loads(row["groups"])),
        tags=tuple(json.loads(row["tags"])),
    )


CHUNK_COLUMNS = "id, document_id, ordinal, trail, text, page, tokens"


@dataclass(frozen=True)
class HitRow:
    """What a ranked passage shows: its chunk and its document's fields, read in one join.

    ``indexer.search.Hit`` is this plus a rank and a score.
    """

    chunk_id: int
    document_id: str
    collection: str
    title: str
    source: str
    trail: tuple[str, ...]
    text: str
    page: int | None
    ordinal: int = 0  # position in its document; consecutive ordinals are adjacent windows
    tokens: int = 0  # word pieces of the chunk
    kind: str = ""  # markdown, html, pdf, text or corpus
    modified: float = 0.0  # the document's modification time, Unix seconds
    tags: tuple[str, ...] = ()  # the document's tags


# The columns of a HitRow, in its field order (chunks c joined to documents d).
HIT_COLUMNS = (
    "c.id, c.document_id, d.collection, d.title, d.source, c.trail, c.text, c.page, "
    "c.ordinal, c.tokens, d.kind, d.modified, d.tags"
)


def hit_row(row: sqlite3.Row) -> HitRow:
    """A row of :data:`HIT_COLUMNS` as a HitRow (trail and tags are stored as JSON).

    The source is as readers are shown it (:func:`~indexer.display.shown_source`): a
    folder's file by its path in the collection, never by the server's absolute path.
    """
    chunk_id, document_id, collection, title, source, trail, text, page, *counts = row
    ordinal, tokens, kind, modified, tags = counts
    return HitRow(
        chunk_id,
        document_id,
        collection,
        title,
        shown_source(document_id, source),
        tuple(json.loads(trail)),
        text,
        page,
        ordinal,
        tokens,
        kind,
        modified,
        tuple(json.loads(tags)),
    )
