"""Joining adjacent chunk windows: the text two windows share at their seam, written once.

Consecutive windows of a section share ``chunk_overlap`` word pieces (see
:mod:`indexer.chunking`); grounding joins them so a passage repeats nothing.
"""

from __future__ import annotations

import re


def _starts_word(text: str, i: int) -> bool:
    return i == 0 or text[i - 1].isspace()


def _ends_word(text: str, k: int) -> bool:
    return k == len(text) or not (text[k - 1].isalnum() and text[k].isalnum())


def overlap_length(a: str, b: str) -> int:
    """Characters at the end of ``a`` that ``b`` starts with (0 when none).

    The longest such overlap that starts a word in ``a`` (the chunker starts
    windows between words). It must also end between words in ``b``, unless
    it spans several words: the chunker cuts a window inside a very long word
    when it must, and a one-word match ("a" / "apple") is a coincidence.
    """
    if not a or not b:
        return 0
    i = a.find(b[0], max(0, len(a) - len(b)))
    while i != -1:
        k = len(a) - i
        if (
            b.startswith(a[i:])
            and _starts_word(a, i)
            and (_ends_word(b, k) or re.search(r"\s", a[i:]))
        ):
            return k
        i = a.find(b[0], i + 1)
    return 0


def join_overlapping(a: str, b: str) -> str:
    """``a`` then ``b``, the text they share at the seam written once.

    Without a shared seam (a trimmed window), a line break keeps the words apart.
    """
    k = overlap_length(a, b)
    if k:
        return a + b[k:]
    return f"{a}\n{b}"
