"""Helpers shared by the format parsers: decoding, clean-up, JSON-safe metadata."""

from __future__ import annotations

import codecs
import datetime as dt
import json
import math
import re
from dataclasses import dataclass, field
from typing import Any

from ..documents import Section
from ..errors import LoadError

UTF8_BOM = b"\xef\xbb\xbf"
INVALID_UTF8 = "invalid UTF-8 replaced with U+FFFD"
# How far into a text-type file a NUL byte marks it as binary (git uses the same rule).
BINARY_SNIFF_BYTES = 8192
# First lines longer than this are prose, not a title.
MAX_TITLE_CHARS = 120

# Generous for real documents (2 M characters is a book of about 1,000 pages; 64 KiB of
# metadata is far more than any front matter holds), small enough that a few KB of
# compressed PDF or of YAML cannot cost minutes of work or hundreds of MB per search.
DEFAULT_MAX_DOCUMENT_CHARS = 2_000_000
DEFAULT_MAX_METADATA_BYTES = 64 * 1024
# A PDF with thousands of broken pages would otherwise carry thousands of warnings.
MAX_WARNINGS = 20
# Office files and scans (see IndexSettings for why these defaults).
DEFAULT_MAX_UNPACKED_BYTES = 128 * 2**20
DEFAULT_MAX_SHEET_ROWS = 50_000
DEFAULT_MAX_SHEET_CELLS = 500_000
DEFAULT_OCR_SECONDS = 300.0

_BLANK_RUNS = re.compile(r"\n[ \t]*\n(?:[ \t]*\n)+")
_SEPARATORS = re.compile(r"[-_\s]+")


@dataclass
class Parsed:
    """What a format parser extracts from one file, before ids and hashes are added."""

    title: str
    sections: list[Section]
    metadata: dict[str, Any] = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)


@dataclass(frozen=True)
class LoadLimits:
    """How much one document may cost: characters of text, bytes of stored metadata."""

    max_chars: int = DEFAULT_MAX_DOCUMENT_CHARS
    max_metadata_bytes: int = DEFAULT_MAX_METADATA_BYTES
    # Office formats (zip containers, spreadsheets) and OCR of scanned PDF pages;
    # defaults as in IndexSettings (the settings say why).
    max_unpacked_bytes: int = DEFAULT_MAX_UNPACKED_BYTES
    max_sheet_rows: int = DEFAULT_MAX_SHEET_ROWS
    max_sheet_cells: int = DEFAULT_MAX_SHEET_CELLS
    ocr: bool = True
    ocr_seconds: float = DEFAULT_OCR_SECONDS
    ocr_language: str = "eng"


DEFAULT_LIMITS = LoadLimits()


def too_many_chars(count: int, limit: int, where: str = "") -> LoadError:
    """The error for text over the character limit (``where``: how far extraction got)."""
    return LoadError(
        f"text is {count} characters{where}, over the limit of {limit} (setting max_document_chars)"
    )


def check_text_size(sections: list[Section], limit: int) -> None:
    """Raise LoadError when the sections hold more than ``limit`` characters."""
    count = sum(len(s.text) for s in sections)
    if count > limit:
        raise too_many_chars(count, limit)


def check_metadata_size(metadata: dict[str, Any], limit: int) -> None:
    """Raise LoadError when ``metadata`` stored as JSON (as the index writer stores it) is
    over ``limit`` bytes: every search that returns the document loads it."""
    size = len(json.dumps(metadata, ensure_ascii=False, default=str).encode("utf-8"))
    if size > limit:
        raise LoadError(
            f"metadata is {size} bytes as stored, over the limit of {limit} "
            "(setting max_metadata_bytes)"
        )


def capped_warnings(warnings: list[str]) -> list[str]:
    """At most MAX_WARNINGS warnings, the rest counted in a last line."""
    if len(warnings) <= MAX_WARNINGS:
        return warnings
    rest = len(warnings) - MAX_WARNINGS + 1
    return [*warnings[: MAX_WARNINGS - 1], f"… and {rest} more warnings"]


def is_binary(data: bytes) -> bool:
    """Whether ``data`` looks binary: a NUL byte in its first 8 KiB.

    UTF-16 text is full of NULs but announces itself with a BOM, so it passes.
    """
    if data.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        return False
    return b"\x00" in data[:BINARY_SNIFF_BYTES]


def decode_text(data: bytes, fallback: str | None = None) -> tuple[str, list[str]]:
    """Decode file bytes to text with LF line ends; return the text and any warnings.

    UTF-8 (BOM stripped) is expected; a UTF-16 BOM is honoured because Windows
    tools write it. ``fallback`` is a declared encoding (an HTML ``<meta charset>``)
    tried before replacing invalid bytes.
    """
    warnings: list[str] = []
    if data.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        text = data.decode("utf-16", errors="replace")
    else:
        if data.startswith(UTF8_BOM):
            data = data[len(UTF8_BOM) :]
        try:
            text = data.decode("utf-8")
        except UnicodeDecodeError:
            declared = _decode_declared(data, fallback)
            if declared is None:
                declared = data.decode("utf-8", errors="replace")
                warnings.append(INVALID_UTF8)
            text = declared
    return normalise_newlines(text.lstrip("\ufeff")), warnings


def _decode_declared(data: bytes, encoding: str | None) -> str | None:
    """``data`` decoded with a declared non-UTF-8 encoding, or None if that does not work."""
    if not encoding:
        return None
    try:
        if codecs.lookup(encoding).name == "utf-8":
            return None
        return data.decode(encoding)
    except (LookupError, UnicodeDecodeError):
        return None


def normalise_newlines(text: str) -> str:
    """CRLF and lone CR (old Mac exports) become LF."""
    return text.replace("\r\n", "\n").replace("\r", "\n")


def tidy_text(text: str) -> str:
    """Strip trailing spaces per line, collapse runs of blank lines to one, trim the ends."""
    text = "\n".join(line.rstrip() for line in text.split("\n"))
    return _BLANK_RUNS.sub("\n\n", text).strip("\n")


def title_from_stem(stem: str) -> str:
    """``restore-db_backup`` → ``Restore db backup``."""
    words = _SEPARATORS.sub(" ", stem).strip()
    return words[:1].upper() + words[1:]


def first_line_title(text: str) -> str | None:
    """The first non-empty line of ``text`` if it is short enough to be a title."""
    for line in text.split("\n"):
        line = line.strip()
        if line:
            return line if len(line) <= MAX_TITLE_CHARS else None
    return None


def same_title(a: str, b: str) -> bool:
    """Whether two titles are the same text, ignoring case and spacing."""
    return " ".join(a.split()).casefold() == " ".join(b.split()).casefold()


def json_safe(value: Any) -> Any:
    """``value`` made JSON-serialisable: dates to ISO strings, odd types to str."""
    if value is None or isinstance(value, (bool, int, str)):
        return value
    if isinstance(value, float):
        # NaN and infinities are not valid JSON.
        return value if math.isfinite(value) else str(value)
    if isinstance(value, (dt.date, dt.time)):  # datetime is a date
        return value.isoformat()
    if isinstance(value, dict):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    if isinstance(value, (set, frozenset)):
        return sorted((json_safe(v) for v in value), key=str)
    if isinstance(value, bytes):
        return value.decode("utf-8", errors="replace")
    return str(value)


def as_tags(value: Any) -> list[str]:
    """Tags given as a list or a comma-separated string, as a list of non-empty strings."""
    if value is None:
        return []
    items = value.split(",") if isinstance(value, str) else value
    if not isinstance(items, (list, tuple, set, frozenset)):
        items = [items]
    tags = (str(json_safe(t)).strip() for t in items if t is not None)
    return [t for t in tags if t]


def short_error(exc: BaseException, limit: int = 200) -> str:
    """``TypeName: message`` of an exception, cut to ``limit`` characters."""
    message = " ".join(str(exc).split())
    text = f"{type(exc).__name__}: {message}" if message else type(exc).__name__
    return text if len(text) <= limit else text[: limit - 1] + "…"
