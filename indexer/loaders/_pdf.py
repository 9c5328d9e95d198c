"""PDF: one section per page with text, via pypdf."""

from __future__ import annotations

import io
import logging
import warnings as py_warnings
from typing import Any

from pypdf import PageObject, PdfReader
from pypdf.errors import DependencyError

from ..documents import Section
from ..errors import LoadError
from ._common import (
    DEFAULT_MAX_DOCUMENT_CHARS,
    DEFAULT_OCR_SECONDS,
    Parsed,
    first_line_title,
    short_error,
    tidy_text,
    title_from_stem,
)
from ._scanned import ScanReader

ENCRYPTED = "encrypted PDF (no password available)"
NO_TEXT_LAYER = "no text (scanned PDF without a text layer?)"

# pypdf logs every recoverable oddity of real-world PDFs; a run over a wiki export
# would drown in them, and a file that truly cannot be read is reported as Skipped.
logging.getLogger("pypdf").setLevel(logging.ERROR)

# Operators that show text; their string operands are what extraction turns into text.
_SHOW_TEXT = frozenset({b"Tj", b"TJ", b"'", b'"'})


class _OverBudget(Exception):
    """Raised from inside pypdf's extraction once a page shows more text than is left."""


def parse_pdf(
    data: bytes,
    stem: str,
    *,
    max_chars: int = DEFAULT_MAX_DOCUMENT_CHARS,
    ocr: bool = True,
    ocr_seconds: float = DEFAULT_OCR_SECONDS,
    ocr_language: str = "eng",
) -> Parsed:
    """Extract page texts (1-based page numbers), title and page count from PDF bytes.

    Extraction stops as soon as the text passes ``max_chars`` (a few KB of
    compressed PDF can hold millions of characters): LoadError then. A scanned
    page (no text layer, an image) is read by OCR when ``ocr`` and tesseract is
    installed, within ``ocr_seconds`` for the document; else skipped with a warning.
    """
    with py_warnings.catch_warnings():
        py_warnings.simplefilter("ignore")
        try:
            return _parse(data, stem, max_chars, ScanReader(ocr, ocr_seconds, ocr_language))
        except (LoadError, MemoryError):
            raise
        except Exception as exc:  # noqa: BLE001 - pypdf raises many types on broken files
            raise LoadError(f"malformed PDF: {short_error(exc)}") from exc


def _page_text(page: PageObject, left: int) -> str:
    """The text of ``page``; _OverBudget as soon as it shows more than ``left`` characters.

    The count is of the shown strings' bytes, at most two a character in the fonts
    PDFs use, so twice ``left`` is never reached by a page within the budget.
    """
    shown = 0

    def count(operator: bytes, operands: list[Any], *_: Any) -> None:
        nonlocal shown
        if operator in _SHOW_TEXT:
            for item in operands[-1] if operator == b"TJ" and operands else operands:
                if isinstance(item, str | bytes):
                    shown += len(item)
            if shown > 2 * left:
                raise _OverBudget

    return page.extract_text(visitor_operand_before=count) or ""


def _parse(data: bytes, stem: str, max_chars: int, scans: ScanReader) -> Parsed:
    reader = PdfReader(io.BytesIO(data))
    if reader.is_encrypted:
        try:
            ok = reader.decrypt("")
        except DependencyError as exc:
            raise LoadError(f"encrypted PDF (cannot decrypt: {exc})") from exc
        if not ok:  # PasswordType.NOT_DECRYPTED is 0
            raise LoadError(ENCRYPTED)
    parsed = Parsed(title="", sections=[])
    first_page_text = ""
    total = 0
    for number, page in enumerate(reader.pages, start=1):
        try:
            text = tidy_text(_printable(_page_text(page, max_chars - total)))
        except _OverBudget:
            raise _stopped(max_chars, number) from None
        except Exception as exc:  # noqa: BLE001 - one bad page should not lose the others
            parsed.warnings.append(f"page {number}: text not extracted ({short_error(exc, 120)})")
            continue
        if not text.strip():
            text = scans.read(page, number, parsed.warnings)
        if number == 1:
            first_page_text = text
        total += len(text)
        if total > max_chars:
            raise _stopped(max_chars, number)
        if text.strip():
            parsed.sections.append(Section(trail=(), text=text, page=number))
    if not parsed.sections:
        raise LoadError(scans.no_text_reason() or NO_TEXT_LAYER)
    parsed.metadata.update(scans.metadata())
    info = _info(reader)
    parsed.metadata["pages"] = len(reader.pages)
    if info.get("author"):
        parsed.metadata["author"] = info["author"]
    parsed.title = info.get("title") or first_line_title(first_page_text) or title_from_stem(stem)
    return parsed


def _stopped(max_chars: int, page: int) -> LoadError:
    return LoadError(
        f"text passes the limit of {max_chars} characters at page {page} "
        "(setting max_document_chars); extraction stopped there"
    )


def _info(reader: PdfReader) -> dict[str, str]:
    """Title and author from the document information dictionary, when readable."""
    try:
        meta = reader.metadata
        if meta is None:
            return {}
        fields = {"title": meta.title, "author": meta.author}
    except Exception:  # noqa: BLE001 - a broken info dict must not lose the text
        return {}
    return {k: " ".join(str(v).split()) for k, v in fields.items() if v and str(v).strip()}


def _printable(text: str) -> str:
    """Page text with LF line ends and without control characters pypdf sometimes emits."""
    text = text.replace("\r\n", "\n").replace("\r", "\n")
    return "".join(c for c in text if c >= " " or c in "\n\t")
