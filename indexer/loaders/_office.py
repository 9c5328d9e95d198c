"""Helpers shared by the office loaders: the text budget, table rows, properties."""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable, Sequence
from typing import Any

from ..documents import Section
from ._common import json_safe, too_many_chars


class TextBudget:
    """Counts the characters extracted so far; stops extraction once past ``limit``.

    Office files compress well (a few MB can hold hundreds of millions of
    characters), so the cap is checked as text comes out, not at the end.
    """

    def __init__(self, limit: int) -> None:
        self.limit = limit
        self.used = 0

    def take(self, text: str, where: str) -> str:
        """Count ``text``; LoadError naming ``where`` (e.g. "at slide 4") when over."""
        self.used += len(text)
        if self.used > self.limit:
            raise too_many_chars(self.used, self.limit, f" by {where}")
        return text


def cell_text(value: Any) -> str:
    """A cell value as a reader would write it: 3.0 → "3", dates as ISO, None → ""."""
    if value is None:
        return ""
    if isinstance(value, bool):
        return "TRUE" if value else "FALSE"
    if isinstance(value, float):
        return str(int(value)) if value.is_integer() and abs(value) < 1e15 else f"{value:g}"
    if isinstance(value, dt.datetime):
        return value.date().isoformat() if value.time() == dt.time() else value.isoformat(" ")
    if isinstance(value, (dt.date, dt.time)):
        return value.isoformat()
    return " ".join(str(value).split())


def header_rows(rows: Sequence[Sequence[str]]) -> list[str]:
    """Table rows as lines: "Header: value; Header: value" under a header row.

    The first row is the header when it has two or more cells and all are
    filled; a cell without a header is named by its column ("column 3").
    Without a header, cells are joined with " | ".
    """
    rows = [r for r in rows if any(c for c in r)]
    if not rows:
        return []
    head = rows[0]
    if len(rows) < 2 or len(head) < 2 or not all(head):
        return [" | ".join(c for c in r if c) for r in rows]
    lines = [" | ".join(head)]
    for row in rows[1:]:
        pairs = [
            f"{head[i] if i < len(head) and head[i] else f'column {i + 1}'}: {c}"
            for i, c in enumerate(row)
            if c
        ]
        lines.append("; ".join(pairs))
    return lines


def dedupe_cells(cells: Iterable[tuple[object, str]]) -> list[str]:
    """Texts of a row's cells, a merged cell (the same key repeated) once."""
    out: list[str] = []
    last: object = None
    for key, text in cells:
        if key is not None and key is last:
            continue
        last = key
        out.append(text)
    return out


def properties(**fields: Any) -> dict[str, Any]:
    """Non-empty document properties, JSON-safe, strings with spacing collapsed."""
    out: dict[str, Any] = {}
    for name, value in fields.items():
        if isinstance(value, str):
            value = " ".join(value.split())
        if value in (None, "", [], {}):
            continue
        out[name] = json_safe(value)
    return out


def core_properties(core: Any) -> dict[str, Any]:
    """The OOXML core properties (python-docx's and python-pptx's ``core_properties``) a
    document's metadata keeps."""
    return properties(
        author=core.author,
        created=core.created,
        modified=core.modified,
        last_modified_by=core.last_modified_by,
        subject=core.subject,
        keywords=core.keywords,
        category=core.category,
    )


def section(trail: Sequence[str], lines: Sequence[str], page: int | None = None) -> Section | None:
    """A section of the non-empty ``lines``, or None when there is no text."""
    text = "\n".join(line for line in lines if line.strip()).strip()
    return Section(trail=tuple(trail), text=text, page=page) if text else None


def set_heading(trail: list[str], level: int, heading: str) -> list[str]:
    """The heading trail after a heading of ``level`` (1 = outermost)."""
    kept = trail[: max(level - 1, 0)]
    return [*kept, heading]
