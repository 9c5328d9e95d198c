"""Grounding passages for chat bots: ranked hits in, cited passages within a budget out.

Pure functions, no I/O. A bot pastes :attr:`Context.text` into its prompt, so
the budget bounds that whole block (passage text, the ``[n]`` numbers,
citation lines and the blank lines between passages), measured by the
caller's counting function: encoder word pieces
(``token_counter(embedder.tokenizer)``) or characters (``len``).

The rules, applied to the hits best first:

- A hit whose chunk directly follows or precedes (consecutive ``ordinal``) a
  chunk already chosen from the same section (same document, heading trail
  and page) joins that passage instead of starting a new one. Consecutive
  windows of a section share ``chunk_overlap`` word pieces; the shared text
  appears once (:func:`join_overlapping`). Neighbouring sections stay
  separate passages, each cited under its own headings.
- At most ``max_per_document`` passages per document; joining a passage does
  not start a new one, so it is never blocked by the cap.
- Section continuation: right after a hit is taken, the windows that follow
  it in its document (``following[hit.chunk_id]``, consecutive ordinals) are
  tried next, while they continue it (:func:`continues`): the rest of its
  section, its subsections, and the following numbered sibling steps (the
  rest of a procedure of "Step n" headings). They
  are not capped by ``max_per_document``. An answer cut after its first
  window misleads a bot more than a missing second document does. The first
  follower that does not fit ends the continuation.
- Passages of one document come in document order (by ordinal); documents in
  the order of their best passage.
- A hit that does not fit in what is left of the budget is skipped, and
  shorter hits below it may still fit.
- When the best hit alone does not fit, its text is cut at a word boundary
  to the longest prefix that fits and marked with :data:`TRUNCATION_MARK`;
  it is then the only passage. This happens only when at least
  ``min_words`` words of it fit: a citation with a word or two says nothing,
  and then the best hit is skipped like any other.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Protocol

from .chunking import Tokenizer
from .seams import join_overlapping, overlap_length  # noqa: F401  (re-exported: tests, callers)

Counter = Callable[[str], int]

SEPARATOR = "\n\n"
TRUNCATION_MARK = " …"
# Fewer words than this of a cut passage is not worth a citation.
MIN_WORDS = 8


class RankedChunk(Protocol):
    """What selection reads from a ranked hit (``indexer.search.Hit`` has it all)."""

    @property
    def chunk_id(self) -> int: ...
    @property
    def document_id(self) -> str: ...
    @property
    def ordinal(self) -> int: ...
    @property
    def title(self) -> str: ...
    @property
    def source(self) -> str: ...
    @property
    def trail(self) -> tuple[str, ...]: ...
    @property
    def page(self) -> int | None: ...
    @property
    def text(self) -> str: ...
    @property
    def score(self) -> float: ...


def token_counter(tokenizer: Tokenizer) -> Counter:
    """Count word pieces of ``tokenizer`` (special tokens not included)."""
    return lambda text: len(tokenizer.spans(text))


def _one_line(text: str) -> str:
    return " ".join(text.split())


@dataclass(frozen=True)
class Citation:
    """Where a passage comes from."""

    document_id: str
    title: str
    source: str
    trail: tuple[str, ...] = ()
    page: int | None = None

    def line(self) -> str:
        """``Title > Heading > Sub, page 3 (source)``; the document id is added
        when the source does not already end with it."""
        crumbs = " > ".join(c for c in map(_one_line, (self.title, *self.trail)) if c)
        if self.page is not None:
            crumbs = f"{crumbs}, page {self.page}" if crumbs else f"page {self.page}"
        where = _one_line(self.source)
        if not where.endswith(self.document_id):
            where = (
                f"{where}; document {_one_line(self.document_id)}"
                if where
                else (f"document {_one_line(self.document_id)}")
            )
        return f"{crumbs} ({where})" if crumbs else where


@dataclass(frozen=True)
class ContextPassage:
    """One numbered passage of the block: one chunk, or adjacent chunks joined."""

    number: int
    chunk_ids: tuple[int, ...]
    citation: Citation
    text: str
    score: float = 0.0
    truncated: bool = False

    def render(self) -> str:
        return render_passage(self.number, self.text, self.citation)


@dataclass(frozen=True)
class Context:
    """The chosen passages and the block to paste; ``used`` is ``count(text)``."""

    passages: tuple[ContextPassage, ...]
    text: str
    used: int
    budget: int


def render_passage(number: int, text: str, citation: Citation) -> str:
    """``[n] text`` then the citation line."""
    return f"[{number}] {text}\nSource: {citation.line()}"


def render(passages: Sequence[ContextPassage]) -> str:
    """The block: rendered passages separated by a blank line."""
    return SEPARATOR.join(p.render() for p in passages)


# -- selection -----------------------------------------------------------------


@dataclass(frozen=True)
class _Draft:
    """A passage being built: a run of consecutive ordinals of one section."""

    key: tuple[str, tuple[str, ...], int | None]
    citation: Citation
    first: int
    last: int
    chunk_ids: tuple[int, ...]
    text: str
    score: float
    truncated: bool = False


def _draft(hit: RankedChunk) -> _Draft:
    return _Draft(
        key=(hit.document_id, tuple(hit.trail), hit.page),
        citation=Citation(hit.document_id, hit.title, hit.source, tuple(hit.trail), hit.page),
        first=hit.ordinal,
        last=hit.ordinal,
        chunk_ids=(hit.chunk_id,),
        text=hit.text.strip(),
        score=float(hit.score),
    )


def _join(a: _Draft, b: _Draft) -> _Draft:
    """``a`` followed by ``b`` (``b.first == a.last + 1``)."""
    return replace(
        a,
        last=b.last,
        chunk_ids=a.chunk_ids + b.chunk_ids,
        text=join_overlapping(a.text, b.text),
        score=max(a.score, b.score),
    )


def _with_hit(drafts: list[_Draft], hit: RankedChunk, cap: float) -> list[_Draft] | None:
    """``drafts`` with ``hit`` joined or appended; None when the cap forbids it."""
    new = _draft(hit)
    before = next(
        (
            i
            for i, d in enumerate(drafts)
            if d.key == new.key and d.last + 1 == new.first and not d.truncated
        ),
        None,
    )
    after = next(
        (i for i, d in enumerate(drafts) if d.key == new.key and d.first - 1 == new.last), None
    )
    out = list(drafts)
    if before is not None and after is not None:
        # The hit bridges two passages: one passage, at the better one's place.
        out[min(before, after)] = _join(_join(drafts[before], new), drafts[after])
        del out[max(before, after)]
    elif before is not None:
        out[before] = _join(drafts[before], new)
    elif after is not None:
        out[after] = _join(new, drafts[after])
    elif sum(d.key[0] == new.key[0] for d in drafts) >= cap:
        return None
    else:
        out.append(new)
    return out


# A heading that names a step of a procedure: "Step 3: ...". Numbered chapters and clauses
# ("5. Email", "8.1 What to report", "1. Outstations") are siblings, not the rest of a
# procedure: continuing into them lost answers on the demo questions (tests/bench/grounding.py).
_NUMBERED = re.compile(r"^\s*step\s+\d+\b", re.IGNORECASE)


def continues(hit_trail: Sequence[str], trail: Sequence[str]) -> bool:
    """Whether a following window with heading ``trail`` continues a hit under ``hit_trail``.

    The rest of the hit's section and its subsections continue it; so does a
    sibling subsection when both headings name steps ("Step 4" after "Step 3"):
    the rest of a numbered procedure. Other siblings (the next question of a
    FAQ, the next policy clause) do not: measured on the demo questions,
    continuing into them spent the budget on text that did not answer.
    """
    own = tuple(hit_trail)
    if tuple(trail[: len(own)]) == own:
        return True
    return (
        len(own) >= 1
        and len(trail) >= len(own)
        and tuple(trail[: len(own) - 1]) == own[:-1]
        and bool(_NUMBERED.match(own[-1]))
        and bool(_NUMBERED.match(trail[len(own) - 1]))
    )


def _in_document_order(drafts: Sequence[_Draft]) -> list[_Draft]:
    """Documents in the order of their first passage, each one's passages by ordinal."""
    rank = {d.key[0]: -1 for d in drafts}
    for i, d in enumerate(drafts):
        rank[d.key[0]] = i if rank[d.key[0]] < 0 else rank[d.key[0]]
    return sorted(drafts, key=lambda d: (rank[d.key[0]], d.first))


def _passages(drafts: Sequence[_Draft]) -> tuple[ContextPassage, ...]:
    drafts = _in_document_order(drafts)
    return tuple(
        ContextPassage(
            number=n,
            chunk_ids=d.chunk_ids,
            citation=d.citation,
            text=d.text,
            score=d.score,
            truncated=d.truncated,
        )
        for n, d in enumerate(drafts, 1)
    )


def _truncated(hit: RankedChunk, budget: int, count: Counter, min_words: int) -> _Draft | None:
    """The longest word-boundary prefix of ``hit`` that fits alone, or None."""
    draft = _draft(hit)
    ends = [m.end() for m in re.finditer(r"\S+", draft.text)]
    lo, hi, best = min_words, len(ends) - 1, None  # all words did not fit, so at most n-1

    def cut(words: int) -> _Draft:
        return replace(draft, text=draft.text[: ends[words - 1]] + TRUNCATION_MARK, truncated=True)

    while lo <= hi:  # counts grow with the words kept
        mid = (lo + hi) // 2
        if count(render_passage(1, cut(mid).text, draft.citation)) <= budget:
            best, lo = mid, mid + 1
        else:
            hi = mid - 1
    return cut(best) if best is not None else None


def select_context(
    hits: Sequence[RankedChunk],
    budget: int,
    count: Counter = len,
    *,
    max_per_document: int = 2,
    min_words: int = MIN_WORDS,
    following: Mapping[int, Sequence[RankedChunk]] | None = None,
) -> Context:
    """The best passages of ``hits`` (best first) whose rendered block fits ``budget``.

    ``following`` maps a hit's chunk id to the windows after it in its document,
    in order (section continuation; the caller fetches them for its top hits).

    See the module docstring for the rules. ``count(result.text) <= budget``
    always holds: the final block is counted whole, and should ``count`` not
    add up over the parts, passages are dropped from the end until it fits.
    """
    if budget < 1:
        raise ValueError(f"budget={budget} must be 1 or more")
    if max_per_document < 1:
        raise ValueError(f"max_per_document={max_per_document} must be 1 or more")
    sep = count(SEPARATOR)
    drafts: list[_Draft] = []
    part_counts: list[int] = []
    history: list[list[_Draft]] = [[]]
    seen: set[int] = set()
    following = following or {}

    def take(hit: RankedChunk, cap: float) -> bool:
        """Add ``hit`` when the cap allows it and the parts fit; whether it was added."""
        nonlocal drafts, part_counts
        trial = _with_hit(drafts, hit, cap)
        if trial is None:
            return False
        # Count only the parts that changed; the sum is checked whole at the end.
        counts = [
            part_counts[i]
            if i < len(drafts) and trial[i] is drafts[i]
            else count(render_passage(i + 1, d.text, d.citation))
            for i, d in enumerate(trial)
        ]
        if sum(counts) + sep * (len(counts) - 1) > budget:
            return False
        drafts, part_counts = trial, counts
        history.append(drafts)
        return True

    for hit in hits:
        if hit.chunk_id in seen or not hit.text.strip():
            continue
        best = not seen
        seen.add(hit.chunk_id)
        if take(hit, max_per_document):
            last = hit.ordinal
            for after in following.get(hit.chunk_id, ()):
                if (
                    after.document_id != hit.document_id
                    or after.ordinal != last + 1
                    or not continues(hit.trail, after.trail)
                ):
                    break
                last = after.ordinal
                if any(after.chunk_id in d.chunk_ids for d in drafts):
                    continue  # taken already as a hit of its own
                if not after.text.strip() or not take(after, float("inf")):
                    break
                seen.add(after.chunk_id)
        elif _with_hit(drafts, hit, max_per_document) is None:
            continue
        elif best:
            cut = _truncated(hit, budget, count, min_words)
            if cut is not None:
                history.append([cut])
                break
    for chosen in reversed(history):
        passages = _passages(chosen)
        text = render(passages)
        used = count(text)
        if used <= budget:
            return Context(passages=passages, text=text, used=used, budget=budget)
    raise AssertionError(f"count('') is over budget={budget}")  # pragma: no cover
