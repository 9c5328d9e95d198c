"""Lexical search: FTS5 syntax in user text is plain text and never raises."""

from __future__ import annotations

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.lexical import fts5_query, query_terms
from sounding.indexer.search import Searcher
from sounding.indexer.settings import IndexSettings
from sounding.indexer.store import IndexReader

FIXTURE_OK = [HealthCheck.function_scoped_fixture]  # the fixture is module-scoped, read-only

PAGES = {
    "err.md": "# Error codes\n\nERR-4471 means the ingest queue is full; drain it first.\n",
    "valves.md": "# Valves\n\nRestoring a valve: close the gate, then replace the seal.\n",
    "near.md": "# Near misses\n\nReport every near miss NEAR the reservoir within a day.\n",
    "food.txt": 'Canteen\n\nSoup (vegetable) is served at noon: "free" on Fridays.\n',
}


@pytest.fixture(scope="module")
def searcher(tmp_path_factory: pytest.TempPathFactory) -> Searcher:
    root = tmp_path_factory.mktemp("pages")
    for name, text in PAGES.items():
        (root / name).write_text(text)
    idx = root.parent / f"{root.name}-idx"
    emb = HashingEmbedder(16)
    refresh_index([root], IndexSettings(index_dir=idx), emb)
    return Searcher(IndexReader(idx), emb)


@pytest.mark.parametrize(
    ("text", "terms"),
    [
        ("How do I restore a valve?", ["restore", "valve"]),
        ("ERR-4471", ["err", "4471"]),
        ('"quoted" (group) NEAR/3 a* -b c:d', ["quoted", "group", "near"]),
        ("EL1 or EL/1", ["el1", "el"]),  # one-character tokens go
        ("x y", ["x", "y"]),  # ... unless nothing else is left
        ("parallel and sequential, parallel", ["parallel", "sequential", "parallel"]),
        ("the and of", ["the", "and", "of"]),  # only stopwords: keep them rather than nothing
        ("***  ((  ))", []),
        ("Ünïcode café", ["ünïcode", "café"]),
    ],
)
def test_query_terms(text: str, terms: list[str]) -> None:
    assert query_terms(text) == terms


def test_fts5_query_quotes_every_term() -> None:
    assert fts5_query('ERR-4471 "xy"') == '"err" OR "4471" OR "xy"'
    assert fts5_query("()") is None


@pytest.mark.parametrize(
    ("query", "expected"),
    [
        ("ERR-4471", "err.md"),
        ("restore valves", "valves.md"),  # Porter stemming: restore ~ restoring, valves ~ valve
        ("NEAR reservoir", "near.md"),
        ('soup "free" (vegetable)', "food.txt"),
        ("seal AND gate", "valves.md"),
    ],
)
def test_lexical_mode_finds_by_words(searcher: Searcher, query: str, expected: str) -> None:
    hits = searcher.search(query, 3, mode="lexical")
    assert hits[0].document_id == expected
    assert all(h.score > 0 for h in hits)


def test_lexical_query_with_no_words_gives_no_hits(searcher: Searcher) -> None:
    assert searcher.search("*** ((", 5, mode="lexical") == []


@pytest.mark.slow  # seconds each: the fast loop stays under a minute
@given(st.text(min_size=1, max_size=200))
@settings(max_examples=300, deadline=None, suppress_health_check=FIXTURE_OK)
def test_any_text_is_a_safe_query_in_every_mode(searcher: Searcher, text: str) -> None:
    if not text.strip():
        return
    for mode in ("lexical", "hybrid"):
        hits = searcher.search(text, 5, mode=mode)
        assert len(hits) <= 5


@given(
    st.lists(
        st.sampled_from(
            [
                '"',
                "(",
                ")",
                "*",
                "-",
                ":",
                "NEAR",
                "AND",
                "OR",
                "NOT",
                "^",
                "+",
                "{",
                "}",
                "NEAR(",
                "valve",
                "gate",
                "'",
                ",",
                "/",
            ]
        ),
        min_size=1,
        max_size=12,
    ).map(" ".join)
)
@settings(max_examples=300, deadline=None, suppress_health_check=FIXTURE_OK)
def test_fts5_syntax_characters_never_raise(searcher: Searcher, text: str) -> None:
    searcher.search(text, 5, mode="lexical")
    searcher.search(text.replace(" ", ""), 5, mode="lexical")
