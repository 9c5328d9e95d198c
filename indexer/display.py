"""What readers are shown of stored documents: sources without server paths, text once.

Pure functions over what the store already holds, so no index needs rebuilding:

- :func:`shown_source`: a document's source relative to its collection's root. A folder
  run stores the file's absolute path (``<root>/<id>``), which tells every reader how
  the server's disks are laid out; readers get the path in the collection instead.
- :func:`document_sections`: a document's text once, from its chunks. Consecutive
  windows of one section share ``overlap`` tokens (:mod:`indexer.chunking`), so the
  chunks laid end to end repeat text; the shared text is found and kept once, and each
  chunk's span in the joined text is given so the passage found can be marked.
"""

from __future__ import annotations

import posixpath
import re
from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import Protocol
from urllib.parse import quote

# A Windows path (C:\… or C:/…) or a UNC share (\\server\…), as a pushed source may hold.
_WINDOWS_PATH = re.compile(r"^(?:[A-Za-z]:[\\/]|\\\\)")
# The shortest text two windows must share to be taken for overlapping windows of one
# section rather than two sections that merely touch (a repeated word or two).
MIN_OVERLAP_CHARS = 12


def is_server_path(source: str) -> bool:
    """Whether ``source`` is an absolute file system path (POSIX or Windows)."""
    return source.startswith("/") or bool(_WINDOWS_PATH.match(source))


def shown_source(document_id: str, source: str) -> str:
    """``source`` as readers see it: never an absolute path on the server.

    ``<root>/<id>`` (a folder run) gives the id, which is the path in the collection;
    ``<root>/<file>#<id>`` (a corpus record) gives ``<file>#<id>``; another absolute
    path gives its file name. URLs and other given values are returned unchanged.
    """
    if not is_server_path(source):
        return source
    path = source.replace("\\", "/")
    if path.endswith("/" + document_id):
        return document_id
    path, hash_mark, record = path.partition("#")
    return posixpath.basename(path) + hash_mark + record


class ChunkLike(Protocol):
    """What :func:`document_sections` reads of a stored chunk."""

    @property
    def id(self) -> int: ...
    @property
    def trail(self) -> tuple[str, ...]: ...
    @property
    def text(self) -> str: ...
    @property
    def page(self) -> int | None: ...
    @property
    def tokens(self) -> int: ...


@dataclass(frozen=True)
class ChunkSpan:
    """Where one chunk's text lies in its section's text: ``text[start:end]``."""

    chunk_id: int
    start: int
    end: int


@dataclass
class DisplaySection:
    """A run of a document's text under one heading trail (and page), shown once."""

    trail: tuple[str, ...]
    page: int | None
    text: str = ""
    chunks: list[ChunkSpan] = field(default_factory=list)


def overlap_length(before: str, after: str, expected: float | None = None) -> int:
    """How many characters ``after`` repeats of the end of ``before``; 0 for none.

    Candidates are ends of ``before`` that ``after`` starts with, starting at a word,
    at least :data:`MIN_OVERLAP_CHARS` long (or all of ``after``). Repetitive text has
    several; ``expected`` (the overlap's length in characters, estimated from its
    tokens) picks the nearest, and rules out those far from it; without it the
    longest is taken.
    """
    if not before or not after:
        return 0
    candidates: list[int] = []
    probe = after[: min(len(after), MIN_OVERLAP_CHARS)]
    pos = before.find(probe, max(0, len(before) - len(after)))
    while pos >= 0:
        at_word = pos == 0 or not before[pos - 1].isalnum() or not after[0].isalnum()
        if at_word and after.startswith(before[pos:]):
            candidates.append(len(before) - pos)
        pos = before.find(probe, pos + 1)
    if not candidates:
        return 0
    if expected is None:
        return candidates[0]
    best = min(candidates, key=lambda n: abs(n - expected))
    return best if abs(best - expected) <= max(16.0, 0.6 * expected) else 0


def document_sections(
    chunks: Iterable[ChunkLike], overlap_tokens: int | None = None
) -> list[DisplaySection]:
    """A document's text once, by section, from its chunks in order.

    A chunk that continues the previous one (same trail and page, sharing its start
    with the previous text's end) adds only what is new; another chunk under the same
    trail and page starts a new paragraph of the same section; a change of trail or
    page starts a new section. ``overlap_tokens`` is the index's chunk overlap (its
    manifest's ``chunking``): 0 means windows never share text.
    """
    sections: list[DisplaySection] = []
    for chunk in chunks:
        current = sections[-1] if sections else None
        if current is None or (current.trail, current.page) != (chunk.trail, chunk.page):
            current = DisplaySection(trail=chunk.trail, page=chunk.page)
            sections.append(current)
        shared = 0
        if overlap_tokens != 0:
            shared = overlap_length(current.text, chunk.text, _expected(chunk, overlap_tokens))
        if shared:
            start = len(current.text) - shared
            current.text += chunk.text[shared:]
        else:
            if current.text:
                current.text += "\n\n"
            start = len(current.text)
            current.text += chunk.text
        current.chunks.append(ChunkSpan(chunk.id, start, start + len(chunk.text)))
    return sections


def _expected(chunk: ChunkLike, overlap_tokens: int | None) -> float | None:
    """The overlap's estimated length in characters: its tokens at the chunk's
    characters per token (``tokens`` counts title, trail and special tokens too)."""
    if overlap_tokens is None or chunk.tokens <= 0:
        return None
    return overlap_tokens * len(chunk.text) / chunk.tokens


def link(base: str | None, path: str) -> str | None:
    """The URL of ``path`` under a collection's ``base`` URL, or None without a base.

    ``base`` is a prefix (``https://wiki.example.org/``) or a template holding
    ``{path}`` (the path in the collection) or ``{stem}`` (the same without its
    file name suffix: ``runbooks/valve`` for ``runbooks/valve.md``).
    """
    if not base or is_server_path(path) or "://" in path:
        return None
    quoted = "/".join(_quote(part) for part in path.split("/"))
    stem = quoted.rsplit(".", 1)[0] if "." in quoted.rsplit("/", 1)[-1] else quoted
    if "{path}" in base or "{stem}" in base:
        return base.replace("{path}", quoted).replace("{stem}", stem)
    return base + quoted


def _quote(part: str) -> str:
    return quote(part, safe="~@:+=,()'-._")
