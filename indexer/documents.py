"""The document model shared by loaders, chunking and the store."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any


@dataclass(frozen=True)
class Section:
    """A run of text under one heading trail (outermost heading first).

    ``page`` is the 1-based page number for PDFs, ``None`` elsewhere.
    """

    trail: tuple[str, ...]
    text: str
    page: int | None = None


@dataclass(frozen=True)
class Document:
    """One loaded document, ready to be chunked.

    ``id`` is stable across runs: the path relative to the indexed root
    (POSIX separators) or a corpus record's ``_id``. ``content_hash`` is the
    SHA-256 hex digest of the raw bytes (of the record, for corpus files);
    the indexer re-embeds a document only when it changes.
    """

    id: str
    title: str
    source: str
    modified: float
    content_hash: str
    kind: str
    sections: tuple[Section, ...]
    metadata: dict[str, Any] = field(default_factory=dict)

    @property
    def text(self) -> str:
        """All section text joined by blank lines."""
        return "\n\n".join(s.text for s in self.sections if s.text)


@dataclass(frozen=True)
class Skipped:
    """A file the run passed over, with a reason a person can act on."""

    path: str
    reason: str
