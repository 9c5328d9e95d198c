"""What readers are shown: sources without server paths, a document's text once,
links to the originals, and the query's words to highlight."""

from __future__ import annotations

from dataclasses import dataclass

import pytest
from hypothesis import given
from hypothesis import strategies as st
from sounding.indexer.chunking import ChunkSettings, chunk_document
from sounding.indexer.display import document_sections, link, overlap_length, shown_source
from sounding.indexer.documents import Document, Section
from sounding.indexer.embedding import WhitespaceTokenizer
from sounding.indexer.highlight import highlights, token_spans


@pytest.mark.parametrize(
    ("doc_id", "source", "shown"),
    [
        ("runbooks/valve.md", "/srv/wiki/runbooks/valve.md", "runbooks/valve.md"),
        ("valve.md", "/home/ops/valve.md", "valve.md"),  # a single-file root
        ("d1", "/data/scifact/corpus.jsonl#d1", "corpus.jsonl#d1"),
        ("notes/a.md", r"C:\wiki\notes\a.md", "notes/a.md"),
        ("x", "/elsewhere/y.md", "y.md"),  # never the path, even when it does not end in the id
        ("kb/42", "https://wiki.example/kb/42", "https://wiki.example/kb/42"),
        ("kb/42", "pushed:kb/42", "pushed:kb/42"),
    ],
)
def test_shown_source_never_has_the_server_path(doc_id: str, source: str, shown: str) -> None:
    assert shown_source(doc_id, source) == shown


@pytest.mark.parametrize(
    ("base", "path", "url"),
    [
        (
            "https://wiki.example.org/",
            "runbooks/valve.md",
            "https://wiki.example.org/runbooks/valve.md",
        ),
        ("https://w.example/{stem}/", "runbooks/valve.md", "https://w.example/runbooks/valve/"),
        ("https://w.example/?p={path}", "a b/c#d.md", "https://w.example/?p=a%20b/c%23d.md"),
        (None, "runbooks/valve.md", None),
        ("https://w.example/", "https://elsewhere/x", None),
    ],
)
def test_links_to_the_original(base: str | None, path: str, url: str | None) -> None:
    assert link(base, path) == url


@dataclass(frozen=True)
class _Chunk:
    id: int
    trail: tuple[str, ...]
    text: str
    page: int | None
    tokens: int


def _chunks(doc: Document, overlap: int) -> list[_Chunk]:
    settings = ChunkSettings(max_tokens=32, overlap=overlap)
    return [
        _Chunk(i, c.trail, c.text, c.page, c.tokens)
        for i, c in enumerate(chunk_document(doc, WhitespaceTokenizer(), settings))
    ]


def _doc(*sections: Section) -> Document:
    return Document("d.md", "D", "/x/d.md", 0.0, "h", "markdown", sections)


WORDS = st.lists(st.sampled_from(["rail", "road", "is", "the", "default", "3.", "Rail", "•"]))


@given(
    words=st.lists(WORDS.map(" ".join).filter(str.strip), min_size=1, max_size=3),
    more=st.lists(st.sampled_from(["alpha", "beta", "gamma", "delta"]), min_size=40, max_size=90),
    overlap=st.sampled_from([0, 4, 15]),
)
def test_document_text_once_and_every_chunk_at_its_span(
    words: list[str], more: list[str], overlap: int
) -> None:
    # Numbered words: in text that repeats one short word, windows' overlaps are
    # ambiguous (test_the_pdf_repeat_of_the_issue_is_gone has a longer repeat).
    body = " ".join(f"{w}{i}" for i, w in enumerate(more))
    doc = _doc(
        *(Section(("A",), w) for w in words[:1]),
        Section(("B",), body),
        Section(("B",), body, page=2),
    )
    chunks = _chunks(doc, overlap)
    sections = document_sections(chunks, overlap)
    spans = {s.chunk_id: (sec, s) for sec in sections for s in sec.chunks}
    assert sorted(spans) == [c.id for c in chunks]
    for c in chunks:
        sec, span = spans[c.id]
        assert sec.text[span.start : span.end] == c.text and sec.trail == c.trail
    # Overlapping windows of one section are joined: each section's words once.
    by_page = {sec.page: sec.text for sec in sections if sec.trail == ("B",)}
    if overlap:
        assert by_page == {None: body, 2: body}
    else:
        assert all(" ".join(t.split()) == body for t in by_page.values())


def test_the_pdf_repeat_of_the_issue_is_gone() -> None:
    page = (
        "3. Rail and road\nRail is the default for bulk transfers between depots. "
        + "Road is used when the rail link is closed for maintenance works. " * 6
    )
    doc = _doc(Section((), page, page=4))
    chunks = _chunks(doc, 15)
    assert len(chunks) > 2 and sum(c.text.count("Rail is the default") for c in chunks) >= 1
    (section,) = document_sections(chunks, 15)
    assert section.text == page.strip()
    assert section.text.count("3. Rail and road\nRail is the default") == 1


@pytest.mark.parametrize(
    ("before", "after", "shared"),
    [
        ("the quick brown fox jumps over", "fox jumps over the lazy dog", len("fox jumps over")),
        ("ends with the", "the start of another", 0),  # too short to be a window's overlap
        ("abc", "", 0),
        ("prefix wordfox jumps over it", "fox jumps over it and more", 0),  # not at a word
    ],
)
def test_overlap_length(before: str, after: str, shared: int) -> None:
    assert overlap_length(before, after) == shared


def _marked(query: str, text: str) -> list[str]:
    return [text[a:b] for a, b in highlights(query, [text])[0]]


@pytest.mark.parametrize(
    ("query", "text", "marked"),
    [
        ("ERR-4472", "ERR-4472 failed, then ERRORS and ERR-4471", ["ERR-4472", "ERR"]),
        ("ERR", "ERRORS and ERROR-codes, ERR", ["ERR"]),  # whole tokens, never a prefix
        ("valves", "Valve, valves, valving; valveless", ["Valve", "valves", "valving"]),
        ("restore the database", "Restoring the databases", ["Restoring", "databases"]),
        ("cafe", "Café naïve", ["Café"]),
        ("snake_case", "snake_case and case snake", ["snake_case"]),
        ("v2.30", "upgrade to v2.30 now", ["v2.30"]),
        ("nothing", "", []),
    ],
)
def test_highlights_are_whole_tokens_as_fts5_counts_them(
    query: str, text: str, marked: list[str]
) -> None:
    assert _marked(query, text) == marked


# Latin scripts: FTS5 classifies characters by Unicode 6.1, Python by a newer version.
@given(st.text(st.characters(max_codepoint=0x24F), max_size=60))
def test_our_token_spans_agree_with_fts5(text: str) -> None:
    # Every token we find is one FTS5 finds: a word of the text is its own highlight.
    for start, end in token_spans(text)[:3]:
        word = text[start:end]
        if word.isascii():
            assert (start, end) in highlights(word, [text])[0] or len(word) == 1
