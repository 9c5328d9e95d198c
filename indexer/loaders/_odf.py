"""OpenDocument text, slides and sheets (.odt, .odp, .ods) via odfpy.

odfpy parses with defusedxml's SAX parser; the container is checked first
(:mod:`._zipcheck`), and an encrypted package (its manifest says so) is refused.
"""

from __future__ import annotations

import io
from collections.abc import Iterator
from typing import Any

from odf.namespaces import DCNS, DRAWNS, METANS, OFFICENS, PRESENTATIONNS, TABLENS, TEXTNS
from odf.opendocument import load

from ..documents import Section
from ..errors import LoadError
from ._common import DEFAULT_LIMITS, LoadLimits, Parsed, title_from_stem
from ._office import TextBudget, cell_text, header_rows, properties, section, set_heading
from ._xlsx import SheetTooBig, sheet_section
from ._zipcheck import ENCRYPTED_OR_LEGACY, open_container

MIMETYPES = {
    "odt": "application/vnd.oasis.opendocument.text",
    "odp": "application/vnd.oasis.opendocument.presentation",
    "ods": "application/vnd.oasis.opendocument.spreadsheet",
}
WHAT = {
    "odt": "OpenDocument text (.odt)",
    "odp": "OpenDocument presentation (.odp)",
    "ods": "OpenDocument spreadsheet (.ods)",
}
REQUIRED = ("mimetype", "content.xml", "META-INF/manifest.xml")
NOTES = "Speaker notes:"
# Elements nest (sections, lists, frames); a hostile file could nest them deeply.
_MAX_DEPTH = 100
_TEXT_NODE = 3


def parse_odf(data: bytes, kind: str, stem: str, limits: LoadLimits = DEFAULT_LIMITS) -> Parsed:
    """``kind`` odt: sections under heading trails (text:h outline levels), tables as rows;
    odp: one section per slide (page = slide number), notes included; ods: one section
    per sheet as "header: value" lines, under the sheet caps. Meta as metadata."""
    archive = open_container(
        data, WHAT[kind], REQUIRED, max_unpacked_bytes=limits.max_unpacked_bytes
    )
    with archive:
        mimetype = archive.read("mimetype").decode("ascii", "replace").strip()
        if b"encryption-data" in archive.read("META-INF/manifest.xml"):
            raise LoadError(ENCRYPTED_OR_LEGACY)
    if mimetype != MIMETYPES[kind]:
        raise LoadError(f"not an {WHAT[kind]}: its mimetype is {mimetype!r} (wrong extension?)")
    document = load(io.BytesIO(data))
    budget = TextBudget(limits.max_chars)
    parsed = Parsed(title="", sections=[])
    if kind == "odt":
        parsed.sections = _text_sections(document.text, budget)
    elif kind == "odp":
        parsed.sections = _slides(document.presentation, budget)
        parsed.metadata["slides"] = sum(1 for _ in _children(document.presentation, DRAWNS, "page"))
        parsed.metadata["page_label"] = "slide"
    else:
        _sheets(document.spreadsheet, limits, budget, parsed)
    meta = _meta(document.meta)
    parsed.metadata = {
        **properties(**{k: v for k, v in meta.items() if k != "title"}),
        **parsed.metadata,
    }
    first_trail = next((s.trail[0] for s in parsed.sections if s.trail), "")
    fallback = first_trail if kind == "odp" else ""
    parsed.title = meta.get("title") or fallback or title_from_stem(stem)
    return parsed


def _name(node: Any) -> tuple[str, str] | None:
    qname = getattr(node, "qname", None)
    return qname if isinstance(qname, tuple) else None


def _children(node: Any, ns: str, local: str) -> Iterator[Any]:
    for child in getattr(node, "childNodes", ()):
        if _name(child) == (ns, local):
            yield child


def _attr(node: Any, ns: str, local: str) -> str | None:
    value = node.attributes.get((ns, local)) if hasattr(node, "attributes") else None
    return str(value) if value is not None else None


def text_of(node: Any, depth: int = 0) -> str:
    """The text of an element as a reader sees it: text:s spaces, tabs, line breaks."""
    parts: list[str] = []
    for child in getattr(node, "childNodes", ()):
        if child.nodeType == _TEXT_NODE:
            parts.append(str(child.data))
            continue
        name = _name(child)
        if name == (TEXTNS, "s"):
            parts.append(" " * min(int(_attr(child, TEXTNS, "c") or 1), 100))
        elif name == (TEXTNS, "tab"):
            parts.append("\t")
        elif name == (TEXTNS, "line-break"):
            parts.append("\n")
        elif name in ((TEXTNS, "note"), (OFFICENS, "annotation")):
            continue  # footnotes and comments would break the sentence they sit in
        elif depth < _MAX_DEPTH:
            parts.append(text_of(child, depth + 1))
            if name in ((TEXTNS, "p"), (TEXTNS, "h")):
                parts.append("\n")  # paragraphs inside frames and cells: one a line
    return "".join(parts)


def _table_lines(table: Any) -> list[str]:
    """A table:table as readable lines (header row, then "header: value" pairs)."""
    rows: list[list[str]] = []
    for row in _rows(table):
        cells = []
        for cell in getattr(row, "childNodes", ()):
            if _name(cell) in ((TABLENS, "table-cell"), (TABLENS, "covered-table-cell")):
                if _name(cell) == (TABLENS, "covered-table-cell"):
                    continue  # the merged cell's text is in the cell that covers it
                cells.append(" ".join(text_of(cell).split()))
        rows.append(cells)
    return header_rows(rows)


def _rows(table: Any, depth: int = 0) -> Iterator[Any]:
    """table:table-row elements, also inside header-rows, row-groups and the like."""
    for child in getattr(table, "childNodes", ()):
        name = _name(child)
        if name == (TABLENS, "table-row"):
            yield child
        elif name is not None and name[0] == TABLENS and depth < _MAX_DEPTH and "row" in name[1]:
            yield from _rows(child, depth + 1)


def _text_sections(body: Any, budget: TextBudget) -> list[Section]:
    sections: list[Section] = []
    trail: list[str] = []
    lines: list[str] = []

    def flush() -> None:
        if made := section(trail, lines):
            sections.append(made)
        lines.clear()

    def walk(node: Any, depth: int, bullet: str) -> None:
        nonlocal trail
        for child in getattr(node, "childNodes", ()):
            name = _name(child)
            if name == (TEXTNS, "h"):
                heading = " ".join(text_of(child).split())
                if heading:
                    budget.take(heading, f"{len(sections) + 1} sections")
                    flush()
                    level = int(_attr(child, TEXTNS, "outline-level") or 1)
                    trail = set_heading(trail, max(1, min(level, 10)), heading)
            elif name == (TEXTNS, "p"):
                text = text_of(child).strip()
                if text:
                    lines.append(budget.take(f"{bullet}{text}", f"{len(sections) + 1} sections"))
            elif name == (TABLENS, "table"):
                rows = _table_lines(child)
                budget.take("\n".join(rows), f"{len(sections) + 1} sections")
                lines.extend(rows)
            elif name == (TEXTNS, "table-of-content"):
                continue  # repeats the headings
            elif name in ((TEXTNS, "list-item"), (TEXTNS, "list-header")):
                if depth < _MAX_DEPTH:
                    walk(child, depth + 1, "- ")
            elif name is not None and depth < _MAX_DEPTH:
                walk(child, depth + 1, bullet)

    walk(body, 0, "")
    flush()
    return sections


def _frame_class(frame: Any) -> str:
    return _attr(frame, PRESENTATIONNS, "class") or ""


def _frame_lines(frame: Any) -> list[str]:
    lines: list[str] = []
    for table in _descendants(frame, TABLENS, "table"):
        lines.extend(_table_lines(table))
    if not lines:
        lines = [line.strip() for line in text_of(frame).split("\n") if line.strip()]
    return lines


def _descendants(node: Any, ns: str, local: str, depth: int = 0) -> Iterator[Any]:
    for child in getattr(node, "childNodes", ()):
        if _name(child) == (ns, local):
            yield child
        elif depth < _MAX_DEPTH:
            yield from _descendants(child, ns, local, depth + 1)


def _slides(body: Any, budget: TextBudget) -> list[Section]:
    sections: list[Section] = []
    for number, page in enumerate(_children(body, DRAWNS, "page"), start=1):
        title = ""
        lines: list[str] = []
        notes: list[str] = []
        for child in getattr(page, "childNodes", ()):
            name = _name(child)
            if name == (PRESENTATIONNS, "notes"):
                for frame in _descendants(child, DRAWNS, "frame"):
                    if _frame_class(frame) == "notes":
                        notes.extend(_frame_lines(frame))
            elif name is not None and name[0] == DRAWNS:
                if _frame_class(child) == "title" and not title:
                    title = " ".join(text_of(child).split())
                else:
                    lines.extend(_frame_lines(child))
        if notes:
            lines += ["", NOTES, *notes]
        budget.take(title + "\n".join(lines), f"slide {number}")
        made = section((title,) if title else (), lines, page=number)
        if made is None and title:
            made = Section(trail=(), text=title, page=number)
        if made is not None:
            sections.append(made)
    return sections


_VALUE_ATTRIBUTES = {
    "float": "value",
    "percentage": "value",
    "currency": "value",
    "date": "date-value",
    "time": "time-value",
    "boolean": "boolean-value",
}


def _cell_value(cell: Any) -> str:
    """A spreadsheet cell's value (a formula's cached one), written as for .xlsx cells."""
    kind = _attr(cell, OFFICENS, "value-type") or ""
    attribute = _VALUE_ATTRIBUTES.get(kind)
    value = _attr(cell, OFFICENS, attribute) if attribute else None
    if value is None:
        return " ".join(text_of(cell).split())
    if attribute == "value":
        try:
            return cell_text(float(value))
        except ValueError:
            return value
    if kind == "boolean":
        return cell_text(value.lower() == "true")
    return value.removesuffix("T00:00:00")


def _sheet_rows(table: Any) -> Iterator[list[str]]:
    """Dense rows of a sheet; empty repeated rows and cells are never expanded
    (LibreOffice writes a million-row run of empty cells at the end of every sheet)."""
    for row in _rows(table):
        values: list[str] = []
        for cell in getattr(row, "childNodes", ()):
            if _name(cell) not in ((TABLENS, "table-cell"), (TABLENS, "covered-table-cell")):
                continue
            repeat = int(_attr(cell, TABLENS, "number-columns-repeated") or 1)
            value = _cell_value(cell)
            if value:
                values.extend([value] * min(repeat, 16_384))  # a sheet has 16,384 columns
            else:
                values.extend([""] * min(repeat, 16_384))
        while values and not values[-1]:
            values.pop()
        if not values:
            continue
        repeat = int(_attr(row, TABLENS, "number-rows-repeated") or 1)
        for _ in range(min(repeat, 1_048_576)):
            yield values


def _sheets(body: Any, limits: LoadLimits, budget: TextBudget, parsed: Parsed) -> None:
    names: list[str] = []
    for table in _children(body, TABLENS, "table"):
        name = _attr(table, TABLENS, "name") or f"Sheet{len(names) + 1}"
        names.append(name)
        try:
            made = sheet_section(name, _sheet_rows(table), limits, budget)
        except SheetTooBig as exc:
            parsed.warnings.append(f"sheet {name!r} skipped: {exc}")
            continue
        if made is not None:
            parsed.sections.append(made)
    parsed.metadata["sheets"] = names
    if not parsed.sections and parsed.warnings:
        raise LoadError(parsed.warnings[0])


def _meta(meta: Any) -> dict[str, str]:
    """Title, author, dates and subject from meta.xml."""
    fields = {
        (DCNS, "title"): "title",
        (DCNS, "creator"): "last_modified_by",
        (METANS, "initial-creator"): "author",
        (METANS, "creation-date"): "created",
        (DCNS, "date"): "modified",
        (DCNS, "subject"): "subject",
    }
    out: dict[str, str] = {}
    keywords: list[str] = []
    for child in getattr(meta, "childNodes", ()):
        name = _name(child)
        text = " ".join(text_of(child).split())
        if name == (METANS, "keyword") and text:
            keywords.append(text)
        elif name in fields and text:
            out[fields[name]] = text
    if "author" not in out and "last_modified_by" in out:
        out["author"] = out["last_modified_by"]
    if keywords:
        out["keywords"] = ", ".join(keywords)
    return out
