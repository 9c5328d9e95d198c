"""Plain text: one section; a short first line doubles as the title."""

from __future__ import annotations

from ..documents import Section
from ._common import Parsed, first_line_title, tidy_text, title_from_stem


def parse_text(text: str, stem: str) -> Parsed:
    """One section holding the whole text; the first line stays in it even as the title."""
    body = tidy_text(text)
    sections = [Section(trail=(), text=body)] if body.strip() else []
    return Parsed(title=first_line_title(body) or title_from_stem(stem), sections=sections)
