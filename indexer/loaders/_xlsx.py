"""Spreadsheets (.xlsx) via openpyxl in read-only mode: one section per sheet.

Rows become "header: value" lines named by the sheet's first row, formulas
their cached values (what the file's author last saw). The row and cell caps
apply per sheet, counted as the rows stream in, so a sheet that claims a
million rows costs no more than the cap.
"""

from __future__ import annotations

import io
import warnings as py_warnings
from collections.abc import Iterable, Sequence
from typing import Any

import openpyxl
from openpyxl.utils import get_column_letter

from ..documents import Section
from ..errors import LoadError
from ._common import DEFAULT_LIMITS, LoadLimits, Parsed, title_from_stem
from ._office import TextBudget, cell_text, properties
from ._zipcheck import open_container

WHAT = "Excel workbook (.xlsx)"
REQUIRED = ("[Content_Types].xml", "xl/workbook.xml")


class SheetTooBig(Exception):
    """A sheet over the row or cell cap; the message is the skip reason."""


def parse_xlsx(data: bytes, stem: str, limits: LoadLimits = DEFAULT_LIMITS) -> Parsed:
    """One section per sheet (trail: the sheet name); sheets over the caps are left
    out with a warning, and LoadError names the cap when every sheet is."""
    open_container(data, WHAT, REQUIRED, max_unpacked_bytes=limits.max_unpacked_bytes).close()
    with py_warnings.catch_warnings():
        py_warnings.simplefilter("ignore")  # "unknown extension", "no default style"
        book = openpyxl.load_workbook(io.BytesIO(data), read_only=True, data_only=True)
    try:
        parsed = Parsed(title="", sections=[])
        budget = TextBudget(limits.max_chars)
        names = []
        for sheet in book.worksheets:
            names.append(sheet.title)
            if hasattr(sheet, "reset_dimensions"):
                # A stored dimension can claim A1:XFD1048576; rows are read as they are.
                sheet.reset_dimensions()
            rows = sheet.iter_rows(values_only=True)
            try:
                made = sheet_section(sheet.title, rows, limits, budget)
            except SheetTooBig as exc:
                parsed.warnings.append(f"sheet {sheet.title!r} skipped: {exc}")
                continue
            if made is not None:
                parsed.sections.append(made)
        props = book.properties
        parsed.metadata = properties(
            author=props.creator,
            created=props.created,
            modified=props.modified,
            last_modified_by=props.lastModifiedBy,
            subject=props.subject,
            keywords=props.keywords,
        )
        parsed.metadata["sheets"] = names
        parsed.title = " ".join((props.title or "").split()) or title_from_stem(stem)
    finally:
        book.close()
    if not parsed.sections and parsed.warnings:
        raise LoadError(parsed.warnings[0])
    return parsed


def sheet_section(
    name: str,
    rows: Iterable[Sequence[Any]],
    limits: LoadLimits,
    budget: TextBudget,
    page: int | None = None,
) -> Section | None:
    """A sheet's rows as one section: the header row, then a line of "header: value"
    pairs per row. SheetTooBig past ``limits.max_sheet_rows`` or ``max_sheet_cells``."""
    header: list[str] | None = None
    lines: list[str] = []
    cells = 0
    filled_rows = 0
    for row in rows:
        cells += len(row)
        if cells > limits.max_sheet_cells:
            raise SheetTooBig(f"over {limits.max_sheet_cells} cells (setting max_sheet_cells)")
        values = [cell_text(v) for v in row]
        if not any(values):
            continue
        filled_rows += 1
        if filled_rows > limits.max_sheet_rows:
            raise SheetTooBig(f"over {limits.max_sheet_rows} rows (setting max_sheet_rows)")
        if header is None:
            header = values
            line = " | ".join(v for v in values if v)
        else:
            line = "; ".join(f"{_column(header, i)}: {v}" for i, v in enumerate(values) if v)
        lines.append(budget.take(line, f"sheet {name!r}"))
    if not lines:
        return None
    return Section(trail=(name,), text="\n".join(lines), page=page)


def _column(header: list[str], index: int) -> str:
    """The header of column ``index`` (0-based), or its letter when it has none."""
    if index < len(header) and header[index]:
        return header[index]
    return f"column {get_column_letter(index + 1)}"
