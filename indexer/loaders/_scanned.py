"""Scanned PDF pages: a page with no text layer but an image is read by OCR, or skipped.

A scanned PDF is one image per page; pypdf hands over that image as it is
stored (JPEG, or PNG for Flate-coded pixels), so no renderer is needed. The
pages read are listed in the document's metadata (``ocr_pages``): chunks on
those pages came from OCR, with its errors.
"""

from __future__ import annotations

import time
from typing import Any

from pypdf import PageObject

from ..errors import LoadError
from ._common import DEFAULT_OCR_SECONDS, LoadLimits, short_error, tidy_text
from ._ocr import MAX_OCR_PIXELS, OcrTimeout, find_tesseract, ocr_image

NO_TEXT_LAYER = "no text layer"
# Form XObjects nest; scans are rarely more than one level down.
_MAX_FORM_DEPTH = 3


def _images(resources: Any, depth: int = 0) -> list[tuple[str, int]]:
    """(name, declared pixels) of the image XObjects of a page, forms opened."""
    found: list[tuple[str, int]] = []
    try:
        xobjects = resources.get("/XObject") if resources is not None else None
        if xobjects is None:
            return found
        xobjects = xobjects.get_object()
        for name in xobjects:
            obj = xobjects[name].get_object()
            subtype = obj.get("/Subtype")
            if subtype == "/Image":
                found.append((str(name), int(obj.get("/Width", 0)) * int(obj.get("/Height", 0))))
            elif subtype == "/Form" and depth < _MAX_FORM_DEPTH:
                found += _images(obj.get("/Resources"), depth + 1)
    except Exception:  # noqa: BLE001 - a broken resource dictionary means no usable image
        return found
    return found


def ocr_options(limits: LoadLimits) -> dict[str, Any]:
    """The OCR keywords of ``parse_pdf`` from the loader limits."""
    return {
        "ocr": limits.ocr,
        "ocr_seconds": limits.ocr_seconds,
        "ocr_language": limits.ocr_language,
    }


class ScanReader:
    """Reads the scanned pages of one PDF within one time budget (``seconds``)."""

    def __init__(
        self, ocr: bool = True, seconds: float = DEFAULT_OCR_SECONDS, language: str = "eng"
    ) -> None:
        self.engine = find_tesseract(language) if ocr else None
        self.why_not = (
            "OCR is off (setting ocr)"
            if not ocr
            else f"install tesseract-ocr with the '{language}' data to read scanned pages"
        )
        self.seconds = seconds
        self.deadline: float | None = None
        self.read_pages: list[int] = []
        self.skipped_pages: list[int] = []
        self.last_why = self.why_not

    def read(self, page: PageObject, number: int, warnings: list[str]) -> str:
        """OCR text of a scanned ``page``, or "" (with a warning saying why)."""
        images = _images(page.get("/Resources"))
        if not images:
            return ""  # a blank page: nothing to read
        if self.engine is None:
            return self._skip(number, warnings, self.why_not)
        if self.deadline is None:
            self.deadline = time.monotonic() + self.seconds
        left = self.deadline - time.monotonic()
        if left <= 0:
            return self._skip(
                number,
                warnings,
                f"the OCR time of {self.seconds:g} s is used up (setting ocr_seconds)",
            )
        name, pixels = max(images, key=lambda item: item[1])
        if pixels > MAX_OCR_PIXELS:
            return self._skip(number, warnings, f"its image has {pixels} pixels, too many to OCR")
        try:
            image = next(i for i in page.images if i.name.rsplit(".", 1)[0] == name.lstrip("/"))
            text = tidy_text(ocr_image(self.engine, image.data, left))
        except OcrTimeout:
            self.deadline = 0.0  # it was given all the time left: none is
            return self._skip(
                number,
                warnings,
                f"OCR stopped: the OCR time of {self.seconds:g} s is used up (setting ocr_seconds)",
            )
        except (LoadError, StopIteration) as exc:
            reason = str(exc) if isinstance(exc, LoadError) else "its image cannot be read"
            return self._skip(number, warnings, reason)
        except Exception as exc:  # noqa: BLE001 - pypdf or Pillow on a broken image
            return self._skip(number, warnings, f"image not decoded ({short_error(exc, 120)})")
        if not text.strip():
            warnings.append(f"page {number}: OCR found no text")
            return ""
        self.read_pages.append(number)
        return text

    def _skip(self, number: int, warnings: list[str], why: str) -> str:
        self.skipped_pages.append(number)
        self.last_why = why
        warnings.append(f"page {number} skipped: {NO_TEXT_LAYER}; {why}")
        return ""

    def no_text_reason(self) -> str | None:
        """Why a PDF of only scanned pages has no text, or None if it had none to read."""
        if not self.skipped_pages:
            return None
        count = len(self.skipped_pages)
        pages = "1 scanned page" if count == 1 else f"{count} scanned pages"
        return f"{NO_TEXT_LAYER} on {pages}; {self.last_why}"

    def metadata(self) -> dict[str, Any]:
        """``ocr_pages`` and ``ocr_engine`` when any page was read by OCR."""
        if not self.read_pages or self.engine is None:
            return {}
        return {"ocr_pages": self.read_pages, "ocr_engine": self.engine.version}
