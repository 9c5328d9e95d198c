"""Grounding passages: selection within a budget, joining of adjacent windows, citations."""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sounding.indexer.chunking import ChunkSettings, chunk_document
from sounding.indexer.documents import Document, Section
from sounding.indexer.embedding import WhitespaceTokenizer
from sounding.indexer.grounding import (
    MIN_WORDS,
    SEPARATOR,
    TRUNCATION_MARK,
    Citation,
    continues,
    join_overlapping,
    overlap_length,
    select_context,
    token_counter,
)
from sounding.indexer.search import Hit

DEMO = Path(__file__).resolve().parents[2] / "demo_corpus"


def hit(
    cid: int,
    doc: str,
    ordinal: int,
    text: str,
    score: float = 1.0,
    *,
    trail: tuple[str, ...] = ("Section",),
    page: int | None = None,
    title: str | None = None,
    source: str | None = None,
) -> Hit:
    return Hit(
        rank=0,
        score=score,
        chunk_id=cid,
        document_id=doc,
        collection="c",
        title=title if title is not None else f"Title of {doc}",
        source=source if source is not None else f"/srv/wiki/{doc}",
        trail=trail,
        text=text,
        page=page,
        ordinal=ordinal,
    )


def words(n: int, tag: str = "w") -> str:
    return " ".join(f"{tag}{i}" for i in range(n))


# A word-piece-like counter: words cut into pieces of at most 4 characters, punctuation
# one piece each (WordPiece behaves alike: Devlin et al. 2019, BERT, section 3).
def pieces(text: str) -> int:
    return sum(-(-len(w) // 4) for w in re.findall(r"\w+|[^\w\s]", text))


# Not additive over the parts: the whole counts more than its parts summed, so the final
# whole-block check has to drop passages.
def superadditive(text: str) -> int:
    return len(text) + len(text) // 50


# -- joining adjacent windows ---------------------------------------------------------------


@pytest.mark.parametrize(
    ("a", "b", "joined"),
    [
        ("a b c d", "c d e f", "a b c d e f"),  # plain overlap
        ("one two three", "two three", "one two three"),  # b is all overlap
        ("x y", "x y z", "x y z"),  # a is all overlap
        ("alpha beta", "gamma delta", "alpha beta\ngamma delta"),  # no overlap: a line break
        ("see a", "apple pie", "see a\napple pie"),  # one word ending inside a word: chance
        ("fix the pump", "pump. Then", "fix the pump. Then"),  # ends before punctuation
        ("xabc", "abc d", "xabc\nabc d"),  # overlap must start a word in a
        # The chunker cut inside a long word: an overlap of several words may end mid-word.
        ("go to https://ex", "to https://example.org now", "go to https://example.org now"),
        ("line one\nline two", "line two\nline three", "line one\nline two\nline three"),
        ("", "b", "\nb"),
    ],
)
def test_join_overlapping(a: str, b: str, joined: str) -> None:
    assert join_overlapping(a, b) == joined


def test_overlap_is_the_longest_match() -> None:
    assert overlap_length("p q r p q", "p q r p q s") == len("p q r p q")
    assert overlap_length("abc", "") == overlap_length("", "abc") == 0


def _section_pairs(doc: Document, tokenizer, chunk_settings: ChunkSettings):
    """(section body, its chunk texts) for sections cut into two windows or more."""
    chunks = chunk_document(doc, tokenizer, chunk_settings)
    for section in doc.sections:
        texts = [c.text for c in chunks if c.trail == section.trail and c.page == section.page]
        if len(texts) > 1:
            yield section.text.strip(), texts


def _join_all(texts: list[str]) -> str:
    out = texts[0]
    for t in texts[1:]:
        out = join_overlapping(out, t)
    return out


@given(
    # Words, and a separator after each of them: only as many separators as words are drawn.
    words=st.lists(
        st.text(alphabet="abcdefghijklmnopqrstuvwxyz", min_size=1, max_size=14),
        min_size=10,
        max_size=400,
    ).flatmap(
        lambda body: st.tuples(
            st.just(body),
            st.lists(
                st.sampled_from([" ", " ", "\n", ", ", ". "]),
                min_size=len(body),
                max_size=len(body),
            ),
        )
    ),
    max_tokens=st.integers(32, 96),
    overlap=st.integers(0, 16),
)
@settings(max_examples=150, deadline=None)
def test_joining_real_chunker_windows_gives_back_the_section(
    words: tuple[list[str], list[str]], max_tokens: int, overlap: int
) -> None:
    body, seps = words
    # Numbered words never repeat, so every overlap found is the true one.
    text = "".join(f"{w}{i}{s}" for i, (w, s) in enumerate(zip(body, seps, strict=False)))
    doc = Document(
        id="d.md",
        title="T",
        source="/d.md",
        modified=0,
        content_hash="h",
        kind="markdown",
        sections=(Section(("S",), text),),
    )
    for section, texts in _section_pairs(
        doc, WhitespaceTokenizer(), ChunkSettings(max_tokens, overlap)
    ):
        joined = _join_all(texts)
        if overlap:
            assert joined == section
        else:  # no shared text: only the white space at the seams may differ
            assert joined.split() == section.split()


def _demo_documents() -> list[Document]:
    from sounding.indexer.loaders import iter_root

    return [d for d in iter_root(DEMO) if isinstance(d, Document)]


@pytest.mark.slow  # seconds each: the fast loop stays under a minute
@pytest.mark.parametrize(
    "chunk_settings", [ChunkSettings(), ChunkSettings(64, 16), ChunkSettings(48, 24)]
)
def test_joining_demo_corpus_windows_gives_back_each_section(chunk_settings) -> None:
    pairs = [
        p
        for d in _demo_documents()
        for p in _section_pairs(d, WhitespaceTokenizer(), chunk_settings)
    ]
    assert pairs, "the demo corpus has sections longer than one window"
    for section, texts in pairs:
        assert _join_all(texts) == section


@pytest.mark.slow
@pytest.mark.parametrize("chunk_settings", [ChunkSettings(), ChunkSettings(64, 16)])
def test_joining_real_tokenizer_windows_gives_back_each_section(
    real_embedder, chunk_settings
) -> None:
    pairs = [
        p
        for d in _demo_documents()
        for p in _section_pairs(d, real_embedder.tokenizer, chunk_settings)
    ]
    assert len(pairs) > 10
    for section, texts in pairs:
        assert _join_all(texts) == section


# -- selection ---------------------------------------------------------------------------------


def test_adjacent_windows_merge_into_one_passage_citing_both() -> None:
    hits = [
        hit(11, "a.md", 1, "w1 w2 w3 w4"),
        hit(20, "b.md", 0, "other text"),
        hit(10, "a.md", 0, "w0 w1 w2"),
    ]
    ctx = select_context(hits, 1000)
    assert [p.chunk_ids for p in ctx.passages] == [(10, 11), (20,)]
    assert ctx.passages[0].text == "w0 w1 w2 w3 w4"
    assert ctx.text.count("w2") == 1


def test_a_hit_between_two_passages_joins_them() -> None:
    hits = [
        hit(1, "a.md", 0, "a b c", 0.9),
        hit(3, "a.md", 2, "e f g", 0.8),
        hit(2, "a.md", 1, "c d e", 0.7),
    ]
    ctx = select_context(hits, 1000, max_per_document=2)
    assert len(ctx.passages) == 1
    (p,) = ctx.passages
    assert p.chunk_ids == (1, 2, 3) and p.text == "a b c d e f g" and p.score == 0.9


def test_neighbouring_sections_stay_separate_passages() -> None:
    hits = [
        hit(1, "a.md", 0, "isolate first", trail=("Isolation",)),
        hit(2, "a.md", 1, "then test", trail=("Testing",)),
    ]
    ctx = select_context(hits, 1000)
    assert [p.citation.trail for p in ctx.passages] == [("Isolation",), ("Testing",)]


def test_at_most_n_passages_per_document_but_merges_are_free() -> None:
    hits = [hit(i, "a.md", 3 * i, f"far apart {i}") for i in range(5)]
    hits.append(hit(99, "a.md", 1, "next to zero"))
    hits.append(hit(50, "b.md", 0, "another document"))
    ctx = select_context(hits, 10_000, max_per_document=2)
    assert [p.chunk_ids for p in ctx.passages] == [(0, 99), (1,), (50,)]


def test_a_passage_that_does_not_fit_is_skipped_for_shorter_ones_below_it() -> None:
    hits = [hit(1, "a.md", 0, words(20)), hit(2, "b.md", 0, words(200)), hit(3, "c.md", 0, "short")]
    first = select_context(hits[:1], 10_000)
    ctx = select_context(hits, first.used + 120)
    assert [p.chunk_ids for p in ctx.passages] == [(1,), (3,)]
    assert [p.number for p in ctx.passages] == [1, 2]


def test_best_passage_too_long_is_cut_at_a_word_and_marked() -> None:
    text = words(300)
    ctx = select_context([hit(1, "a.md", 0, text), hit(2, "b.md", 0, "tiny")], 400)
    (p,) = ctx.passages
    assert p.truncated and p.text.endswith(TRUNCATION_MARK)
    kept = p.text[: -len(TRUNCATION_MARK)]
    assert text.startswith(kept) and text[len(kept)] == " "  # cut between words
    assert ctx.used <= 400 and len(ctx.text) == ctx.used
    # The longest prefix: one word more would not fit.
    longer = text[: text.index(" ", len(kept) + 1)] + TRUNCATION_MARK
    assert len(ctx.text.replace(p.text, longer)) > 400


def test_no_cut_when_fewer_than_min_words_would_fit() -> None:
    long_title = "A title that takes most of the budget " * 3
    best = hit(1, "a.md", 0, words(300), title=long_title)
    one = select_context([best], 10_000).passages[0].citation.line()
    budget = len(f"[1] {' '.join(words(MIN_WORDS).split())}\nSource: {one}") - 1
    ctx = select_context([best], budget)
    assert ctx.passages == () and ctx.text == "" and ctx.used == 0
    # A shorter hit below it still gets its chance, whole.
    ctx = select_context([best, hit(2, "b.md", 0, "short", title="S")], budget)
    assert [p.chunk_ids for p in ctx.passages] == [(2,)] and not ctx.passages[0].truncated


def test_rendered_block_numbers_each_passage_and_follows_it_with_its_citation() -> None:
    hits = [
        hit(
            1,
            "manual.pdf",
            4,
            "Torque the bolts.",
            trail=("Assembly", "Bolts"),
            page=3,
            title="Pump manual",
            source="/srv/docs/manual.pdf",
        ),
        hit(
            2,
            "kb/42",
            0,
            "Reset the breaker.",
            trail=(),
            title="Breaker",
            source="https://wiki.example/kb/42?rev=7",
        ),
    ]
    ctx = select_context(hits, 1000)
    assert ctx.text == (
        "[1] Torque the bolts.\n"
        "Source: Pump manual > Assembly > Bolts, page 3 (/srv/docs/manual.pdf)"
        + SEPARATOR
        + "[2] Reset the breaker.\n"
        "Source: Breaker (https://wiki.example/kb/42?rev=7; document kb/42)"
    )
    assert ctx.passages[0].citation == Citation(
        "manual.pdf", "Pump manual", "/srv/docs/manual.pdf", ("Assembly", "Bolts"), 3
    )


def test_citation_line_is_one_line_even_when_fields_hold_line_breaks() -> None:
    c = Citation("d", "Two\nlines", "/x/d", ("A\n B",), None)
    assert c.line() == "Two lines > A B (/x/d)"
    assert Citation("d", "", "", (), 2).line() == "page 2 (document d)"


def test_duplicate_and_empty_hits_are_ignored() -> None:
    ctx = select_context(
        [hit(1, "a.md", 0, "same"), hit(1, "a.md", 0, "same"), hit(2, "b.md", 0, "  \n ")], 1000
    )
    assert [p.chunk_ids for p in ctx.passages] == [(1,)]
    assert select_context([], 5) == select_context([], 5)
    assert select_context([], 5).text == ""


@pytest.mark.parametrize("bad", [{"budget": 0}, {"budget": 5, "max_per_document": 0}])
def test_bad_arguments_are_refused(bad) -> None:
    with pytest.raises(ValueError):
        select_context([], **bad)


# -- properties ------------------------------------------------------------------------------

_WORD = st.text(alphabet="abcdefghijklmnopqrstuvwxyz0123456789.,;:-()'é[]", min_size=1, max_size=12)


@st.composite
def ranked_hits(draw) -> list[Hit]:
    """Hits of a few documents in random rank order; (document, ordinal) is one chunk."""
    keys = draw(st.lists(st.tuples(st.integers(0, 3), st.integers(0, 7)), unique=True, max_size=24))
    hits = []
    for cid, (d, o) in enumerate(keys):
        text = " ".join(draw(st.lists(_WORD, min_size=0, max_size=60)))
        pdf = d == 3
        hits.append(
            hit(
                cid,
                f"doc{d}.pdf" if pdf else f"doc{d}.md",
                o,
                text,
                draw(st.floats(0, 1)),
                trail=(f"H{o // 3}",),
                page=o // 2 + 1 if pdf else None,
                title=draw(st.sampled_from(["", "Guide", "A much longer title here"])),
            )
        )
    return hits


def check_context(ctx, hits, budget, count, max_per_document) -> None:
    """What holds for every answer."""
    assert count(ctx.text) == ctx.used <= budget
    assert [p.number for p in ctx.passages] == list(range(1, len(ctx.passages) + 1))
    by_id = {h.chunk_id: h for h in hits}
    cited = [c for p in ctx.passages for c in p.chunk_ids]
    assert len(cited) == len(set(cited)) and set(cited) <= set(by_id)
    per_doc: dict[str, int] = {}
    for p in ctx.passages:
        sources = {by_id[c].document_id for c in p.chunk_ids}
        assert sources == {p.citation.document_id}
        ordinals = [by_id[c].ordinal for c in p.chunk_ids]
        assert ordinals == list(range(ordinals[0], ordinals[0] + len(ordinals)))
        assert p.citation.line() and p.citation.document_id
        assert f"[{p.number}] {p.text}\nSource: {p.citation.line()}" in ctx.text
        per_doc[p.citation.document_id] = per_doc.get(p.citation.document_id, 0) + 1
        if p.truncated:
            assert len(ctx.passages) == 1 and p.text.endswith(TRUNCATION_MARK)
    assert all(n <= max_per_document for n in per_doc.values())
    assert (ctx.text == "") == (not ctx.passages)


@given(
    hits=ranked_hits(),
    budget=st.integers(1, 3000),
    counter=st.sampled_from([len, pieces, superadditive]),
    cap=st.integers(1, 3),
)
@pytest.mark.slow  # seconds each: the fast loop stays under a minute
@settings(max_examples=400, deadline=None)
def test_block_never_exceeds_the_budget_and_every_passage_is_cited(
    hits, budget, counter, cap
) -> None:
    ctx = select_context(hits, budget, counter, max_per_document=cap)
    check_context(ctx, hits, budget, counter, cap)


@pytest.mark.slow  # seconds each: the fast loop stays under a minute
@given(hits=ranked_hits(), budget=st.integers(1, 3000))
@settings(max_examples=200, deadline=None)
def test_whitespace_tokens_counter_never_exceeds(hits, budget) -> None:
    count = token_counter(WhitespaceTokenizer())
    check_context(select_context(hits, budget, count), hits, budget, count, 2)


@pytest.mark.slow
@given(hits=ranked_hits(), budget=st.integers(1, 1500))
@settings(
    max_examples=100, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
def test_real_tokenizer_budget_never_exceeded(real_embedder, hits, budget) -> None:
    count = token_counter(real_embedder.tokenizer)
    check_context(select_context(hits, budget, count), hits, budget, count, 2)


# -- section continuation ---------------------------------------------------------


@pytest.mark.parametrize(
    ("hit_trail", "trail", "expected"),
    [
        (("Restore",), ("Restore",), True),  # the rest of its section
        (("Restore",), ("Restore", "Checks"), True),  # its subsection
        (("Restore", "Step 3: fetch"), ("Restore", "Step 4: configure"), True),  # next step
        (("Restore", "Step 3"), ("Restore", "Step 4", "Notes"), True),
        (("Restore", "Step 7"), ("Rebuilding the replica",), False),  # the procedure ended
        (("Accounts", "Locked out?"), ("Accounts", "New phone?"), False),  # next FAQ entry
        (("8. Incidents", "8.1 What"), ("8. Incidents", "8.2 How"), False),  # policy clauses
        (("5. Email",), ("6. Suppliers",), False),  # chapters
        ((), ("Anything",), True),  # a document without headings is one section
    ],
)
def test_what_continues_a_hit(hit_trail, trail, expected: bool) -> None:
    assert continues(hit_trail, trail) is expected


def _procedure() -> list[Hit]:
    return [
        hit(10 + i, "runbook.md", i, words(6, f"s{i}"), trail=("Restore", f"Step {i}: do"))
        for i in range(1, 6)
    ]


def test_the_steps_after_a_high_hit_come_before_other_documents() -> None:
    steps = _procedure()
    other = hit(99, "other.md", 0, words(6, "o"))
    ctx = select_context(
        [steps[1], other], 10_000, pieces, max_per_document=1, following={12: steps[2:]}
    )
    # Steps 3..5 follow step 2, uncapped by max_per_document, before the other document.
    assert [p.chunk_ids for p in ctx.passages] == [(12,), (13,), (14,), (15,), (99,)]


def test_continuation_stops_at_the_first_window_that_does_not_fit() -> None:
    steps = _procedure()
    whole = select_context([steps[1]], 10_000, pieces, following={12: steps[2:]})
    two = pieces(SEPARATOR.join(p.render() for p in whole.passages[:2]))
    ctx = select_context([steps[1]], two + 1, pieces, following={12: steps[2:]})
    assert [p.chunk_ids for p in ctx.passages] == [(12,), (13,)]
    assert pieces(ctx.text) <= ctx.budget


def test_passages_of_one_document_come_in_document_order() -> None:
    a2, b0, a0 = (
        hit(3, "a.md", 5, words(5, "x")),
        hit(7, "b.md", 0, words(5, "y")),
        hit(1, "a.md", 1, words(5, "z"), trail=("Other",)),
    )
    ctx = select_context([a2, b0, a0], 10_000, pieces, max_per_document=2)
    assert [p.chunk_ids for p in ctx.passages] == [(1,), (3,), (7,)]
    assert [p.number for p in ctx.passages] == [1, 2, 3]


@given(st.integers(20, 400), st.integers(1, 3))
@settings(max_examples=40, deadline=None)
def test_with_continuation_the_block_still_fits(budget: int, cap: int) -> None:
    steps = _procedure()
    hits = [steps[2], hit(50, "x.md", 0, words(9, "q")), steps[0]]
    following = {13: steps[3:], 11: steps[1:]}
    ctx = select_context(hits, budget, pieces, max_per_document=cap, following=following)
    assert pieces(ctx.text) == ctx.used <= budget
    seen = [c for p in ctx.passages for c in p.chunk_ids]
    assert len(seen) == len(set(seen))
