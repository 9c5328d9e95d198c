"""Slide decks (.pptx) via python-pptx: one section per slide, its number kept as the page."""

from __future__ import annotations

import io
from collections.abc import Iterator
from typing import Any

import pptx
from pptx.enum.shapes import MSO_SHAPE_TYPE

from ..documents import Section
from ._common import DEFAULT_LIMITS, LoadLimits, Parsed, title_from_stem
from ._office import TextBudget, core_properties, dedupe_cells, header_rows, section
from ._zipcheck import open_container

WHAT = "PowerPoint deck (.pptx)"
REQUIRED = ("[Content_Types].xml", "ppt/presentation.xml")
NOTES = "Speaker notes:"
# Group shapes nest; a hostile deck could nest them deeply.
_MAX_GROUP_DEPTH = 20


def parse_pptx(data: bytes, stem: str, limits: LoadLimits = DEFAULT_LIMITS) -> Parsed:
    """One section per slide with text (page = slide number, title as heading, speaker
    notes after the slide's text), and the core properties as metadata."""
    open_container(data, WHAT, REQUIRED, max_unpacked_bytes=limits.max_unpacked_bytes).close()
    deck = pptx.Presentation(io.BytesIO(data))
    budget = TextBudget(limits.max_chars)
    sections: list[Section] = []
    first_title = ""
    count = 0
    for number, slide in enumerate(deck.slides, start=1):
        count = number
        title_shape = slide.shapes.title
        title = " ".join(title_shape.text_frame.text.split()) if title_shape is not None else ""
        first_title = first_title or title
        lines: list[str] = []
        for shape in _shapes(slide.shapes, 0):
            if title_shape is not None and shape.shape_id == title_shape.shape_id:
                continue
            lines.extend(_shape_lines(shape))
        if slide.has_notes_slide:
            frame = slide.notes_slide.notes_text_frame
            notes = frame.text.strip() if frame is not None else ""
            if notes:
                lines += ["", NOTES, notes]
        budget.take(title + "\n".join(lines), f"slide {number}")
        made = section((title,) if title else (), lines, page=number)
        if made is None and title:
            made = Section(trail=(), text=title, page=number)
        if made is not None:
            sections.append(made)
    core = deck.core_properties
    metadata = core_properties(core)
    metadata["slides"] = count
    metadata["page_label"] = "slide"  # Section.page counts slides, not pages
    title = " ".join((core.title or "").split()) or first_title or title_from_stem(stem)
    return Parsed(title=title, sections=sections, metadata=metadata)


def _shapes(shapes: Any, depth: int) -> Iterator[Any]:
    """Shapes in reading order (top to bottom, then left to right), groups opened."""

    def position(shape: Any) -> tuple[int, int]:
        return (shape.top or 0, shape.left or 0)

    for shape in sorted(shapes, key=position):
        if shape.shape_type == MSO_SHAPE_TYPE.GROUP and depth < _MAX_GROUP_DEPTH:
            yield from _shapes(shape.shapes, depth + 1)
        else:
            yield shape


def _shape_lines(shape: Any) -> list[str]:
    """The text of one shape: its paragraphs, or a table's rows."""
    if getattr(shape, "has_table", False) and shape.has_table:
        rows = [
            dedupe_cells((cell._tc, " ".join(cell.text.split())) for cell in row.cells)
            for row in shape.table.rows
        ]
        return header_rows(rows)
    if getattr(shape, "has_text_frame", False) and shape.has_text_frame:
        return [p.strip() for p in shape.text_frame.text.split("\n") if p.strip()]
    return []
