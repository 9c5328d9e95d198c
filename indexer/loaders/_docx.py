"""Word documents (.docx) via python-docx: heading trails, table rows, core properties."""

from __future__ import annotations

import io
import re
from typing import Any

import docx
from docx.oxml.ns import qn
from docx.table import Table
from docx.text.paragraph import Paragraph

from ..documents import Section
from ._common import DEFAULT_LIMITS, LoadLimits, Parsed, title_from_stem
from ._office import (
    TextBudget,
    core_properties,
    dedupe_cells,
    header_rows,
    section,
    set_heading,
)
from ._zipcheck import open_container

WHAT = "Word document (.docx)"
REQUIRED = ("[Content_Types].xml", "word/document.xml")
_HEADING_NAME = re.compile(r"^heading ([1-9])$", re.IGNORECASE)
# w:outlineLvl 0-8 are heading levels 1-9; 9 means body text.
_BODY_LEVEL = 9


def parse_docx(data: bytes, stem: str, limits: LoadLimits = DEFAULT_LIMITS) -> Parsed:
    """Sections under the heading trail of Word's heading styles (or outline levels),
    tables as rows, and title, author and dates from the core properties."""
    open_container(data, WHAT, REQUIRED, max_unpacked_bytes=limits.max_unpacked_bytes).close()
    document = docx.Document(io.BytesIO(data))
    budget = TextBudget(limits.max_chars)
    sections: list[Section] = []
    trail: list[str] = []
    lines: list[str] = []
    styled_title = ""
    tables = 0

    def flush() -> None:
        if made := section(trail, lines):
            sections.append(made)
        lines.clear()

    for number, block in enumerate(document.iter_inner_content(), start=1):
        if isinstance(block, Paragraph):
            text = block.text.strip()
            if not text:
                continue
            budget.take(text, f"block {number}")
            if _style_name(block).lower() == "title":
                styled_title = styled_title or " ".join(text.split())
                continue
            level = _heading_level(block)
            if level is not None:
                flush()
                trail = set_heading(trail, level, " ".join(text.split()))
            else:
                lines.append(text)
        elif isinstance(block, Table):
            tables += 1
            rows = _table_rows(block)
            budget.take("\n".join(rows), f"table {tables}")
            if lines:
                lines.append("")
            lines.extend(rows)
    flush()
    core = document.core_properties
    metadata = core_properties(core)
    if tables:
        metadata["tables"] = tables
    title = " ".join((core.title or "").split()) or styled_title or title_from_stem(stem)
    return Parsed(title=title, sections=sections, metadata=metadata)


def _style_name(paragraph: Paragraph) -> str:
    try:
        style = paragraph.style
    except (KeyError, ValueError):  # a style id that styles.xml does not define
        return ""
    return (style.name or "") if style is not None else ""


def _outline_level(ppr: Any) -> int | None:
    """The w:outlineLvl of a paragraph-properties element, if any."""
    if ppr is None:
        return None
    found = ppr.find(qn("w:outlineLvl"))
    if found is None:
        return None
    try:
        return int(found.get(qn("w:val")))
    except (TypeError, ValueError):
        return None


def _heading_level(paragraph: Paragraph) -> int | None:
    """1-based heading level from the paragraph's outline level or its style chain."""
    level = _outline_level(paragraph._p.pPr)
    if level is None:
        try:
            style = paragraph.style
        except (KeyError, ValueError):
            style = None
        seen = 0
        while style is not None and level is None and seen < 20:  # based-on loops exist
            if match := _HEADING_NAME.match(style.name or ""):
                return int(match.group(1))
            level = _outline_level(style.element.pPr)
            style = style.base_style
            seen += 1
    if level is None or not 0 <= level < _BODY_LEVEL:
        return None
    return level + 1


def _table_rows(table: Table) -> list[str]:
    """A table as readable lines; merged cells once."""
    rows: list[list[str]] = []
    for row in table.rows:
        rows.append(dedupe_cells((cell._tc, " ".join(cell.text.split())) for cell in row.cells))
    return header_rows(rows)
