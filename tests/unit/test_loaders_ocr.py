"""Scanned PDF pages: detected, read by Tesseract when it is installed (chunks marked in
metadata), skipped with "no text layer" when it is not, always within the OCR time cap."""

from __future__ import annotations

import io
import os
import shutil

import pypdf
import pytest
from sounding.indexer.documents import Document
from sounding.indexer.errors import LoadError
from sounding.indexer.loaders import LoadLimits, parse_document
from sounding.indexer.loaders import _scanned as scan
from sounding.indexer.loaders._ocr import OcrEngine, OcrTimeout

from tests.unit.loading import make_pdf
from tests.unit.office_files import scanned_pdf_bytes

FORM = [
    "Quillmere Water Cooperative",
    "Permit to work: confined space entry",
    "Site: Otterbrook booster station",
    "Gas test before entry: oxygen 20.9 percent",
    "Authorised by: Sunniva Peake, control room",
]
# Character error rate bound for clean, machine-printed text scanned at 150 dpi. OCR
# evaluations (the ISRI annual tests; Tesseract's own reports) count CER this way:
# edit distance over reference length, and put clean print well under 1-2 %; 5 % is
# a loose bound that still fails a wrong page or a garbled read (figures from memory).
MAX_CER = 0.05
HAVE_TESSERACT = shutil.which("tesseract") is not None


def cer(got: str, want: str) -> float:
    """Levenshtein distance of the whitespace-normalised texts over the reference length."""
    a, b = " ".join(got.split()), " ".join(want.split())
    row = list(range(len(b) + 1))
    for i, ca in enumerate(a, start=1):
        prev, row[0] = row[0], i
        for j, cb in enumerate(b, start=1):
            prev, row[j] = row[j], min(row[j] + 1, row[j - 1] + 1, prev + (ca != cb))
    return row[-1] / max(len(b), 1)


def parse(data: bytes, **limits: object) -> Document:
    return parse_document(
        data,
        "pdf",
        doc_id="form.pdf",
        name="form.pdf",
        source="form.pdf",
        modified=0.0,
        limits=LoadLimits(**limits),  # type: ignore[arg-type]
    )


def mixed_pdf() -> bytes:
    """Page 1 with a text layer, page 2 a scan, page 3 blank."""
    writer = pypdf.PdfWriter()
    for source in (make_pdf([["Typed cover page"]]), scanned_pdf_bytes([FORM]), make_pdf([[]])):
        writer.append(pypdf.PdfReader(io.BytesIO(source)))
    out = io.BytesIO()
    writer.write(out)
    return out.getvalue()


def test_without_tesseract_a_scanned_page_is_skipped_with_no_text_layer(monkeypatch) -> None:
    monkeypatch.setattr(scan, "find_tesseract", lambda language: None)
    doc = parse(mixed_pdf())
    assert [s.page for s in doc.sections] == [1]
    (warning,) = doc.metadata["warnings"]
    assert warning.startswith("page 2 skipped: no text layer; install tesseract-ocr")
    with pytest.raises(LoadError, match="^no text layer on 1 scanned page; install"):
        parse(scanned_pdf_bytes([FORM]))


def test_ocr_off_by_setting_skips_the_page_saying_so() -> None:
    with pytest.raises(
        LoadError, match=r"no text layer on 2 scanned pages; OCR is off \(setting ocr\)"
    ):
        parse(scanned_pdf_bytes([FORM, FORM]), ocr=False)


def test_the_ocr_time_cap_is_per_document(monkeypatch) -> None:
    calls: list[float] = []

    def slow(engine: OcrEngine, image: bytes, timeout: float) -> str:
        calls.append(timeout)
        raise OcrTimeout("OCR stopped")

    monkeypatch.setattr(scan, "find_tesseract", lambda language: OcrEngine("t", "eng", "fake"))
    monkeypatch.setattr(scan, "ocr_image", slow)
    with pytest.raises(LoadError, match="ocr_seconds"):
        parse(scanned_pdf_bytes([FORM, FORM, FORM]), ocr_seconds=5)
    assert len(calls) == 1 and 0 < calls[0] <= 5  # the rest found the budget used up


def test_an_image_too_large_to_ocr_is_skipped(monkeypatch) -> None:
    monkeypatch.setattr(scan, "find_tesseract", lambda language: OcrEngine("t", "eng", "fake"))
    monkeypatch.setattr(scan, "MAX_OCR_PIXELS", 1000)
    with pytest.raises(LoadError, match="too many to OCR"):
        parse(scanned_pdf_bytes([FORM]))


needs_tesseract = pytest.mark.skipif(
    not HAVE_TESSERACT and not os.environ.get("CI"),
    reason="tesseract not installed (scripts/test.sh installs tesseract-ocr)",
)


@needs_tesseract
@pytest.mark.slow
@pytest.mark.subprocess
def test_ocr_reads_a_rendered_page_within_the_character_error_rate() -> None:
    doc = parse(mixed_pdf())
    assert [s.page for s in doc.sections] == [1, 2]
    assert doc.metadata["ocr_pages"] == [2]
    assert doc.metadata["ocr_engine"].startswith("tesseract")
    rate = cer(doc.sections[1].text, "\n".join(FORM))
    assert rate <= MAX_CER, (rate, doc.sections[1].text)


@needs_tesseract
@pytest.mark.subprocess
def test_a_real_tesseract_past_its_time_is_killed_and_the_page_skipped() -> None:
    with pytest.raises(LoadError, match="ocr_seconds"):
        parse(scanned_pdf_bytes([FORM]), ocr_seconds=0.01)
