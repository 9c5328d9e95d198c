"""Loaders: plain text, and its title rule."""

from __future__ import annotations

from pathlib import Path

import pytest
from sounding.indexer.documents import Section

from tests.unit.loading import load_one


@pytest.mark.parametrize(
    ("content", "title", "text"),
    [
        ("Release notes\n\nFixed things.\n", "Release notes", "Release notes\n\nFixed things."),
        ("\n\n   Padded title  \nbody", "Padded title", "   Padded title\nbody"),
        ("x" * 121 + "\nbody", "Ops log", "x" * 121 + "\nbody"),
        ("x" * 120, "x" * 120, "x" * 120),
        ("a\n\n\n\n\nb", "a", "a\n\nb"),
    ],
)
def test_text_title_rule(tmp_path: Path, content: str, title: str, text: str) -> None:
    doc = load_one(tmp_path, "ops_log.txt", content)
    assert doc.title == title
    assert doc.sections == (Section(trail=(), text=text),)
