"""Chunking: token limits, overlap, word boundaries and heading trails."""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sounding.indexer.chunking import SPECIAL_TOKENS, ChunkSettings, chunk_document, window_bounds
from sounding.indexer.documents import Document, Section
from sounding.indexer.embedding import WhitespaceTokenizer
from sounding.indexer.errors import SettingsError

TOK = WhitespaceTokenizer()


def doc(*sections: Section, title: str = "Pump station handbook") -> Document:
    return Document(
        id="d.md",
        title=title,
        source="/x/d.md",
        modified=0.0,
        content_hash="h",
        kind="markdown",
        sections=tuple(sections),
    )


def words(n: int, start: int = 0) -> str:
    return " ".join(f"w{i}" for i in range(start, start + n))


@pytest.mark.parametrize("max_tokens", [32, 48, 64, 100, 256])
@pytest.mark.parametrize("overlap", [0, 4, 16])
@pytest.mark.parametrize("n_words", [1, 10, 31, 200, 1000])
def test_no_chunk_exceeds_the_token_limit(max_tokens: int, overlap: int, n_words: int) -> None:
    chunks = chunk_document(
        doc(Section(("Intake", "Screens"), words(n_words))), TOK, ChunkSettings(max_tokens, overlap)
    )
    assert chunks
    for c in chunks:
        assert c.tokens <= max_tokens
        assert c.tokens == len(TOK.spans(c.embed_text)) + SPECIAL_TOKENS


@pytest.mark.parametrize("n_words", [1, 50, 333, 1000])
@pytest.mark.parametrize("overlap", [0, 8, 20])
def test_windows_cover_every_word_in_order(n_words: int, overlap: int) -> None:
    chunks = chunk_document(doc(Section((), words(n_words))), TOK, ChunkSettings(64, overlap))
    seen: list[str] = []
    for c in chunks:
        for w in c.text.split():
            if not seen or int(w[1:]) > int(seen[-1][1:]):
                seen.append(w)
    assert seen == words(n_words).split()


@pytest.mark.parametrize("overlap", [0, 5, 12, 20])
def test_consecutive_windows_share_overlap_tokens(overlap: int) -> None:
    chunks = chunk_document(
        doc(Section((), words(500)), title=""), TOK, ChunkSettings(max_tokens=50, overlap=overlap)
    )
    assert len(chunks) > 3
    for a, b in zip(chunks, chunks[1:], strict=False):
        shared = set(a.text.split()) & set(b.text.split())
        assert len(shared) == overlap


@pytest.mark.parametrize(
    ("trail", "title", "expected_prefix"),
    [
        ((), "Pump station handbook", "Pump station handbook\n"),
        (("Restores",), "Handbook", "Handbook\nRestores\n"),
        (("Restores", "From tape"), "Handbook", "Handbook\nRestores > From tape\n"),
        (("Restores",), "", "Restores\n"),
    ],
)
def test_title_and_trail_are_embedded(trail, title, expected_prefix) -> None:
    (c,) = chunk_document(doc(Section(trail, "Mount the volume first."), title=title), TOK)
    assert c.embed_text.startswith(expected_prefix)
    assert c.text == "Mount the volume first."
    assert c.trail == trail


def test_sections_are_never_merged_and_keep_their_trails_and_pages() -> None:
    d = doc(
        Section(("A",), "alpha text", page=1),
        Section(("A", "B"), "beta text", page=2),
        Section(("C",), "   "),
        Section(("C", "D"), "delta text"),
    )
    chunks = chunk_document(d, TOK)
    assert [(c.trail, c.text, c.page) for c in chunks] == [
        (("A",), "alpha text", 1),
        (("A", "B"), "beta text", 2),
        (("C", "D"), "delta text", None),
    ]
    assert [c.ordinal for c in chunks] == [0, 1, 2]


def test_long_title_takes_at_most_a_quarter_of_the_window() -> None:
    (c, *_) = chunk_document(
        doc(Section((), words(300)), title=words(200, start=5000)), TOK, ChunkSettings(64, 0)
    )
    body = len(TOK.spans(c.text))
    assert body >= (64 - SPECIAL_TOKENS) * 3 // 4
    assert c.tokens <= 64


def test_windows_end_between_words_when_possible() -> None:
    # "abc-def" is three tokens ("abc", "-", "def") but one word to a reader.
    text = " ".join(["abc-def"] * 100)
    for c in chunk_document(doc(Section((), text), title=""), TOK, ChunkSettings(40, 6)):
        assert c.text.startswith("abc") and c.text.endswith("def")


@pytest.mark.parametrize(
    ("starts", "budget", "overlap", "expected"),
    [
        ([True] * 10, 4, 0, [(0, 4), (4, 8), (8, 10)]),
        ([True] * 10, 4, 2, [(0, 4), (2, 6), (4, 8), (6, 10)]),
        ([True] * 3, 10, 2, [(0, 3)]),
        ([True, False, False, True, False, False], 4, 0, [(0, 3), (3, 6)]),
        ([True] + [False] * 9, 4, 1, [(0, 4), (3, 7), (6, 10)]),  # no word start: hard cut
    ],
)
def test_window_bounds(starts, budget, overlap, expected) -> None:
    assert window_bounds(starts, budget, overlap) == expected


@given(
    # n pieces, and a start flag for each of them: only the n flags used are drawn.
    n_starts=st.integers(1, 400).flatmap(
        lambda n: st.tuples(st.just(n), st.lists(st.booleans(), min_size=n, max_size=n))
    ),
    budget=st.integers(1, 80),
    overlap=st.integers(0, 40),
)
@pytest.mark.slow  # seconds each: the fast loop stays under a minute
@settings(max_examples=300, deadline=None)
def test_window_bounds_cover_progress_and_respect_budget(
    n_starts: tuple[int, list[bool]], budget: int, overlap: int
) -> None:
    n, starts = n_starts
    bounds = window_bounds(starts, budget, overlap)
    assert bounds[0][0] == 0 and bounds[-1][1] == n
    for a, b in bounds:
        assert 0 < b - a <= budget
    for (a1, b1), (a2, b2) in zip(bounds, bounds[1:], strict=False):
        assert a1 < a2 <= b1 < b2  # moves forward, leaves no gap


@pytest.mark.parametrize(
    ("max_tokens", "overlap", "model_max"),
    [(300, 32, 256), (16, 0, 256), (256, 200, 256), (256, -1, 256)],
)
def test_bad_chunk_settings_are_refused(max_tokens, overlap, model_max) -> None:
    with pytest.raises(SettingsError, match="chunk_"):
        ChunkSettings(max_tokens, overlap).check(model_max)


def test_empty_document_gives_no_chunks() -> None:
    assert chunk_document(doc(Section((), "  \n "), title=""), TOK) == []


@pytest.mark.parametrize("sections", [(), (Section(("H",), "  "),)])
def test_title_only_document_gives_one_chunk_of_its_title(sections) -> None:
    (c,) = chunk_document(doc(*sections, title="Parallel sorting on drums"), TOK)
    assert c.text == c.embed_text == "Parallel sorting on drums" and c.tokens == 4 + 2


def test_embed_hash_depends_on_embedded_text_only() -> None:
    a = chunk_document(doc(Section(("X",), "same words")), TOK)[0]
    b = chunk_document(doc(Section(("X",), "same words")), TOK)[0]
    c = chunk_document(doc(Section(("Y",), "same words")), TOK)[0]
    assert a.embed_hash == b.embed_hash != c.embed_hash
