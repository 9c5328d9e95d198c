"""Structure-aware chunking measured in the encoder's own tokens.

Pure functions: a :class:`~indexer.documents.Document` and a tokenizer in,
:class:`Chunk` values out. Sections (one per heading, or per PDF page) are
never merged; a section longer than the window is cut into overlapping
windows whose edges fall between words where possible. Every chunk carries
the document title and its heading trail, and both are part of the text the
encoder sees, so a passage about "rollback" under "Deploys > Rollback" is
found by either word.
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Protocol

from .documents import Document
from .errors import SettingsError

# [CLS] and [SEP] of BERT-style encoders; they count against max_seq_length.
SPECIAL_TOKENS = 2


class Tokenizer(Protocol):
    """What chunking needs from a tokenizer."""

    def spans(self, text: str) -> list[tuple[int, int]]:
        """Character spans of the word pieces of ``text``, without special tokens."""
        ...


@dataclass(frozen=True)
class ChunkSettings:
    """How documents are cut; recorded in the index manifest.

    ``max_tokens`` bounds the whole encoder input (special tokens, title and
    heading trail included); ``overlap`` is how many body tokens consecutive
    windows of one section share.
    """

    max_tokens: int = 256
    overlap: int = 32

    def check(self, model_max_tokens: int) -> None:
        """Raise SettingsError unless these settings fit the encoder."""
        if self.max_tokens > model_max_tokens:
            raise SettingsError(
                f"chunk_tokens={self.max_tokens} is over the encoder's maximum sequence "
                f"length of {model_max_tokens}; set chunk_tokens to {model_max_tokens} or less"
            )
        if self.max_tokens < 32:
            raise SettingsError(f"chunk_tokens={self.max_tokens} is too small; use 32 or more")
        if not 0 <= self.overlap <= self.max_tokens // 2:
            raise SettingsError(
                f"chunk_overlap={self.overlap} must be between 0 and half of "
                f"chunk_tokens ({self.max_tokens // 2})"
            )


@dataclass(frozen=True)
class Chunk:
    """One passage of a document.

    ``text`` is what a reader is shown; ``embed_text`` is what the encoder
    sees (title and heading trail, then the passage); ``tokens`` counts the
    word pieces of ``embed_text`` including special tokens.
    """

    ordinal: int
    trail: tuple[str, ...]
    text: str
    embed_text: str
    tokens: int
    page: int | None = None

    @property
    def embed_hash(self) -> str:
        """Digest of ``embed_text``: equal digests can share one vector."""
        return hashlib.sha256(self.embed_text.encode("utf-8")).hexdigest()


def _trim_to_tokens(text: str, spans: Sequence[tuple[int, int]], limit: int) -> str:
    """The longest prefix of ``text`` holding at most ``limit`` tokens."""
    if len(spans) <= limit:
        return text
    if limit <= 0:
        return ""
    return text[: spans[limit - 1][1]]


def _prefix(doc: Document, trail: tuple[str, ...], tokenizer: Tokenizer, limit: int) -> str:
    """Title and heading trail as the encoder sees them, cut to ``limit`` tokens."""
    parts = [p for p in (doc.title.strip(), " > ".join(t for t in trail if t.strip())) if p]
    prefix = "\n".join(parts)
    return _trim_to_tokens(prefix, tokenizer.spans(prefix), limit)


def _word_starts(text: str, spans: Sequence[tuple[int, int]]) -> list[bool]:
    """For each token, whether a window may start at it (not mid-word)."""
    starts = [True] * len(spans)
    for i in range(1, len(spans)):
        # Pieces of one word touch: "chunk" "##ing" (or "abc" "-" "def") have no
        # white space between them.
        starts[i] = spans[i][0] > spans[i - 1][1]
    return starts


def window_bounds(starts: Sequence[bool], budget: int, overlap: int) -> list[tuple[int, int]]:
    """Token index ranges ``[a, b)`` covering ``len(starts)`` tokens.

    Each range holds at most ``budget`` tokens; consecutive ranges share
    about ``overlap`` tokens; range edges move back to a word start when one
    lies in the second half of the window, so words are rarely split.
    """
    n = len(starts)
    if budget <= 0:
        raise ValueError("budget must be positive")
    overlap = min(overlap, budget // 2)
    bounds: list[tuple[int, int]] = []
    a = prev_b = 0
    while a < n:
        b = min(a + budget, n)
        if b < n:
            # Prefer ending before a word start, but not at the cost of half a
            # window, and always past the previous window's end.
            for cut in range(b, max(a + budget // 2, prev_b), -1):
                if starts[cut]:
                    b = cut
                    break
        bounds.append((a, b))
        prev_b = b
        if b >= n:
            break
        nxt = max(b - overlap, a + 1)
        for back in range(nxt, a, -1):
            if starts[back]:
                nxt = back
                break
        a = max(nxt, a + 1)
    return bounds


def chunk_document(
    doc: Document, tokenizer: Tokenizer, settings: ChunkSettings | None = None
) -> list[Chunk]:
    """Cut ``doc`` into chunks that each fit ``settings.max_tokens``.

    Sections are chunked one by one, in order; empty sections give nothing.
    The title and trail may take at most a quarter of the window, so a long
    title never crowds out the passage itself. A document with no text but
    a title gives one chunk of its title.
    """
    settings = settings or ChunkSettings()
    usable = settings.max_tokens - SPECIAL_TOKENS
    chunks: list[Chunk] = []
    for section in doc.sections:
        body = section.text.strip()
        if not body:
            continue
        prefix = _prefix(doc, section.trail, tokenizer, usable // 4)
        prefix_tokens = len(tokenizer.spans(prefix)) if prefix else 0
        budget = usable - prefix_tokens
        spans = tokenizer.spans(body)
        if not spans:
            continue
        starts = _word_starts(body, spans)
        overlap = min(settings.overlap, budget // 2)
        for a, b in window_bounds(starts, budget, overlap):
            text = body[spans[a][0] : spans[b - 1][1]]
            embed_text = f"{prefix}\n{text}" if prefix else text
            # Joining can merge pieces at the seam; re-count and trim to be sure
            # the encoder never truncates what we store.
            embed_spans = tokenizer.spans(embed_text)
            while len(embed_spans) > usable:
                excess = len(embed_spans) - usable
                text_spans = tokenizer.spans(text)
                text = _trim_to_tokens(text, text_spans, len(text_spans) - excess)
                embed_text = f"{prefix}\n{text}" if prefix else text
                embed_spans = tokenizer.spans(embed_text)
            chunks.append(
                Chunk(
                    ordinal=len(chunks),
                    trail=section.trail,
                    text=text,
                    embed_text=embed_text,
                    tokens=len(embed_spans) + SPECIAL_TOKENS,
                    page=section.page,
                )
            )
    if not chunks and doc.title.strip():
        # A document that is only a title (old collections have such records)
        # is searchable by its title alone.
        title = doc.title.strip()
        title = _trim_to_tokens(title, tokenizer.spans(title), usable)
        chunks.append(
            Chunk(
                ordinal=0,
                trail=(),
                text=title,
                embed_text=title,
                tokens=len(tokenizer.spans(title)) + SPECIAL_TOKENS,
            )
        )
    return chunks
