"""Which words of a text to highlight for a query: whole tokens, as the lexical ranking
counts them.

The lexical ranking (:mod:`indexer.lexical`) matches the query's words, stopwords
dropped, through SQLite FTS5's ``porter unicode61 remove_diacritics 2`` tokenizer
(:data:`indexer.store.format.SCHEMA`): text is cut at every character that is not a
letter or digit, folded, and stemmed. Here the same tokenizer, in a private in-memory
database, says which tokens of a text match: "valves" lights up "valve" and "Valving",
never "valveless"; ``ERR`` lights up the token ``ERR`` and never ``ERRORS``; a word the
tokenizer cuts in parts (``snake_case``) matches only where its parts follow each other.
Matches separated only by punctuation (``ERR-4472``) are one highlight.
"""

from __future__ import annotations

import sqlite3
import unicodedata
from collections.abc import Sequence

from .lexical import query_terms

Span = tuple[int, int]

_TOKENIZER = "porter unicode61 remove_diacritics 2"
# Besides letters and numbers: private use, and combining marks (folded with diacritics).
_ALSO_TOKEN = frozenset({"Co", "Mn", "Mc", "Me"})


def token_spans(text: str) -> list[Span]:
    """Character spans of the tokens FTS5's unicode61 tokenizer finds in ``text``.

    Token characters are letters, numbers and private-use characters (its default
    categories ``L* N* Co``) and combining marks, which it folds away with diacritics.
    """
    spans: list[Span] = []
    start = -1
    for i, ch in enumerate(text):
        inside = ch.isalnum() or unicodedata.category(ch) in _ALSO_TOKEN
        if inside and start < 0:
            start = i
        elif not inside and start >= 0:
            spans.append((start, i))
            start = -1
    if start >= 0:
        spans.append((start, len(text)))
    return spans


def highlights(query: str, texts: Sequence[str]) -> list[list[Span]]:
    """For each of ``texts``, the character spans to highlight for ``query``."""
    terms = query_terms(query)
    if not terms or not texts:
        return [[] for _ in texts]
    conn = sqlite3.connect(":memory:")
    try:
        conn.execute(f"CREATE VIRTUAL TABLE t USING fts5(body, tokenize = '{_TOKENIZER}')")
        conn.execute("CREATE VIRTUAL TABLE v USING fts5vocab(t, 'instance')")
        # Row 1..n: the texts; the rows after them: the query's terms, one a row.
        conn.executemany("INSERT INTO t(rowid, body) VALUES (?, ?)", enumerate(texts, 1))
        first_term = len(texts) + 1
        conn.executemany("INSERT INTO t(rowid, body) VALUES (?, ?)", enumerate(terms, first_term))
        stems: dict[int, dict[int, str]] = {}
        for term, doc, offset in conn.execute("SELECT term, doc, offset FROM v"):
            stems.setdefault(doc, {})[offset] = term
    finally:
        conn.close()
    phrases = {
        tuple(stems[row][i] for i in sorted(stems[row]))
        for row in range(first_term, first_term + len(terms))
        if row in stems
    }
    return [_marks(text, stems.get(row, {}), phrases) for row, text in enumerate(texts, 1)]


def _marks(text: str, stems: dict[int, str], phrases: set[tuple[str, ...]]) -> list[Span]:
    """Spans of ``text`` where a phrase's stems occur in order, adjacent matches joined."""
    spans = token_spans(text)
    if len(spans) != len(stems) or not phrases:
        return []  # the tokenizers disagree on this text: better no highlight than a wrong one
    words = [stems[i] for i in range(len(spans))]
    hit = [False] * len(words)
    for phrase in phrases:
        n = len(phrase)
        for i in range(len(words) - n + 1):
            if tuple(words[i : i + n]) == phrase:
                hit[i : i + n] = [True] * n
    out: list[Span] = []
    for i, (start, end) in enumerate(spans):
        if not hit[i]:
            continue
        # "ERR-4472", "v2.3": tokens joined by punctuation alone read as one word.
        if out and hit[i - 1] and _joined(text[out[-1][1] : start]):
            out[-1] = (out[-1][0], end)
        else:
            out.append((start, end))
    return out


def _joined(between: str) -> bool:
    return 0 < len(between) <= 2 and not any(ch.isspace() for ch in between)
