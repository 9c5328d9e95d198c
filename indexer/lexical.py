"""Turning free text into a safe SQLite FTS5 query for BM25 ranking.

User text never reaches FTS5 as syntax: it is cut into word tokens, each
token is quoted as an FTS5 string, and the tokens are joined with OR, so
quotes, parentheses, ``*``, ``-``, ``:``, ``NEAR`` or ``AND`` in a query are
plain words (or nothing) and never raise.
"""

from __future__ import annotations

import re
from collections.abc import Sequence

# Common English function words (common practice in BM25 retrieval; this list
# was written from memory). Dropping them keeps OR-queries fast and their
# matches from drowning the words that matter.
_STOPWORD_TEXT = """a about above after again against all am an and any are as at be because
    been before
    being below between both but by can could did do does doing down during each few for from
    further had has have having he her here hers herself him himself his how i if in into is it
    its itself just me more most my myself no nor not now of off on once only or other our ours
    ourselves out over own same she should so some such than that the their theirs them
    themselves then there these they this those through to too under until up very was we were
    what when where which while who whom why will with would you your yours yourself
    yourselves"""
STOPWORDS = frozenset(_STOPWORD_TEXT.split())

_WORD = re.compile(r"\w+", re.UNICODE)


def query_terms(text: str, *, max_terms: int = 64) -> list[str]:
    """Lower-cased word tokens of ``text``; stopwords and one-character tokens are
    dropped unless nothing else is left."""
    words = [w.lower() for w in _WORD.findall(text)]
    # One-character tokens ("t" of "don't", "1" of "EL/1") match nearly every
    # chunk and add only noise; like stopwords, they go unless nothing is left.
    content = [w for w in words if w not in STOPWORDS and len(w) > 1]
    # Repeats stay: FTS5's bm25() sums over the query's phrases, so a word the
    # question repeats weighs more, as BM25's query term frequency intends.
    return (content or words)[:max_terms]


def fts5_match(terms: Sequence[str]) -> str:
    """An FTS5 MATCH expression matching any of ``terms``, each quoted as one phrase."""
    return " OR ".join('"' + t.replace('"', '""') + '"' for t in terms)


def fts5_query(text: str) -> str | None:
    """An FTS5 MATCH expression matching any of the words of ``text``; None if it has none."""
    terms = query_terms(text)
    return fts5_match(terms) if terms else None
