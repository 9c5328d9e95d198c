"""Loaders: PDF.

Page numbers, titles, encrypted, malformed and text-less files; the make_pdf helper.
"""

from __future__ import annotations

import hashlib
import io
from pathlib import Path

import pypdf
import pytest
from sounding.indexer.documents import Section
from sounding.indexer.errors import LoadError
from sounding.indexer.loaders import load_file

from tests.unit.loading import (
    encrypt_pdf,
    load_one,
    make_pdf,
    skip_reason,
    write,
)


def test_make_pdf_helper_builds_a_readable_pdf() -> None:
    reader = pypdf.PdfReader(io.BytesIO(make_pdf([["Hello (world)"], []], title="T")))
    assert len(reader.pages) == 2
    assert reader.pages[0].extract_text() == "Hello (world)"
    assert reader.metadata is not None and reader.metadata.title == "T"


def test_pdf_pages_keep_their_numbers(tmp_path: Path) -> None:
    data = make_pdf([["Quarterly report", "Revenue up"], [], ["Page three"]], author="Ann")
    doc = load_one(tmp_path, "report.pdf", data)
    assert doc.kind == "pdf"
    assert doc.sections == (
        Section(trail=(), text="Quarterly report\nRevenue up", page=1),
        Section(trail=(), text="Page three", page=3),
    )
    assert doc.metadata == {"pages": 3, "author": "Ann"}
    assert doc.title == "Quarterly report"
    assert doc.content_hash == hashlib.sha256(data).hexdigest()


@pytest.mark.parametrize(
    ("pages", "title", "expected"),
    [
        ([["First line", "x"]], "Info title", "Info title"),
        ([["First line", "x"]], "   ", "First line"),
        ([["First line", "x"]], None, "First line"),
        ([["L" * 121, "x"]], None, "Annual review"),
        ([[], ["Second page"]], None, "Annual review"),
    ],
)
def test_pdf_title_rules(
    tmp_path: Path, pages: list[list[str]], title: str | None, expected: str
) -> None:
    assert load_one(tmp_path, "annual_review.pdf", make_pdf(pages, title=title)).title == expected


def test_encrypted_pdf_is_skipped_with_a_reason(tmp_path: Path) -> None:
    data = encrypt_pdf(make_pdf([["secret text"]]), "secret")
    assert skip_reason(tmp_path, "locked.pdf", data) == "encrypted PDF (no password available)"


def test_pdf_encrypted_with_an_empty_user_password_loads(tmp_path: Path) -> None:
    data = encrypt_pdf(make_pdf([["open text"]]), "", owner="owner-only")
    assert load_one(tmp_path, "x.pdf", data).text == "open text"


@pytest.mark.parametrize(
    "data",
    [b"this is not a PDF at all", b"%PDF-1.4\n1 0 obj garbage", make_pdf([["cut"]])[:150]],
)
def test_malformed_pdf_is_skipped(tmp_path: Path, data: bytes) -> None:
    assert skip_reason(tmp_path, "bad.pdf", data).startswith("malformed PDF: ")


def test_pdf_without_a_text_layer_is_skipped(tmp_path: Path) -> None:
    reason = skip_reason(tmp_path, "scan.pdf", make_pdf([[], []]))
    assert reason == "no text (scanned PDF without a text layer?)"


def test_load_file_raises_load_error_for_a_bad_pdf(tmp_path: Path) -> None:
    with pytest.raises(LoadError, match="^malformed PDF: "):
        load_file(write(tmp_path, "bad.pdf", b"\x00\x01garbage"), "bad.pdf")
