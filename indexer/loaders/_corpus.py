"""BEIR-style corpus.jsonl(.gz): one document per JSON line, streamed."""

from __future__ import annotations

import gzip
import hashlib
import io
import json
import zlib
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from ..documents import Document, Section, Skipped
from ..errors import LoadError
from ._common import (
    DEFAULT_LIMITS,
    INVALID_UTF8,
    UTF8_BOM,
    LoadLimits,
    check_metadata_size,
    is_binary,
    json_safe,
    normalise_newlines,
    short_error,
    tidy_text,
)

BINARY = "binary content in a text file"
_RESERVED = ("_id", "title", "text", "metadata")


def iter_corpus(
    path: Path, rel: str, source: str, modified: float, limits: LoadLimits = DEFAULT_LIMITS
) -> Iterator[Document | Skipped]:
    """Documents of a corpus file, and a ``Skipped("rel:line", reason)`` per bad line.

    Raises LoadError when the file as a whole cannot be used (binary, corrupt
    gzip, no records at all). The raw line without its line end is hashed, so
    re-compressing the file or changing line ends does not re-embed anything.
    """
    gz = path.name.lower().endswith(".gz")
    lineno = 0
    with _open(path, gz) as f:
        try:
            if is_binary(f.read(8192)):
                raise LoadError(BINARY)
            f.seek(0)
            seen_any = False
            for lineno, raw in enumerate(f, start=1):
                line = raw.rstrip(b"\r\n")
                if lineno == 1 and line.startswith(UTF8_BOM):
                    line = line[len(UTF8_BOM) :]
                if not line.strip():
                    continue
                seen_any = True
                yield _record(line, lineno, rel, source, modified, limits)
        except (EOFError, zlib.error, gzip.BadGzipFile) as exc:
            where = f" (after line {lineno})" if lineno else ""
            raise LoadError(f"corrupt gzip file{where}: {short_error(exc)}") from exc
    if not seen_any:
        raise LoadError("no text")


def _open(path: Path, gz: bool) -> io.BufferedIOBase:
    if gz:
        return gzip.open(path, "rb")  # a GzipFile reads bytes like any binary file
    return path.open("rb")


def _no_repeats(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    """A JSON object's dict, refusing a repeated key (json.loads keeps the last one)."""
    out: dict[str, Any] = {}
    for key, value in pairs:
        if key in out:
            raise ValueError(f"the record repeats the key {key!r}")
        out[key] = value
    return out


def _record(
    line: bytes, lineno: int, rel: str, source: str, modified: float, limits: LoadLimits
) -> Document | Skipped:
    """One corpus line as a Document, or as a Skipped naming the line and the problem."""
    where = f"{rel}:{lineno}"
    warnings: list[str] = []
    try:
        text_line = line.decode("utf-8")
    except UnicodeDecodeError:
        text_line = line.decode("utf-8", errors="replace")
        warnings.append(INVALID_UTF8)
    # A repeated "groups" would be read as its last value: which was meant is uncertain.
    # The strict parse costs more, so only lines that could repeat it pay for it.
    hook = _no_repeats if text_line.count('"groups"') > 1 else None
    try:
        record: Any = json.loads(text_line, object_pairs_hook=hook)
    except json.JSONDecodeError as exc:
        return Skipped(where, f"invalid JSON: {exc.msg} (column {exc.colno})")
    except (ValueError, RecursionError) as exc:
        return Skipped(where, f"invalid JSON: {short_error(exc)}")
    if not isinstance(record, dict):
        return Skipped(where, "not a JSON object")
    doc_id = record.get("_id")
    if doc_id is None:
        return Skipped(where, "record has no '_id'")
    # Some exports write numeric ids; bool is an int subclass but no id.
    if isinstance(doc_id, int) and not isinstance(doc_id, bool):
        doc_id = str(doc_id)
    if not isinstance(doc_id, str) or not doc_id.strip():
        return Skipped(where, "'_id' must be a non-empty string")
    text = record.get("text")
    if text is None:
        return Skipped(where, "record has no 'text'")
    if not isinstance(text, str):
        return Skipped(where, "'text' must be a string")
    if len(text) > limits.max_chars:
        return Skipped(
            where,
            f"text is {len(text)} characters, over the limit of {limits.max_chars} "
            "(setting max_document_chars)",
        )
    text = tidy_text(normalise_newlines(text))
    title = record.get("title")
    title = "" if title is None else " ".join(str(json_safe(title)).split())
    # Old test collections hold title-only records; the title is their content.
    if not text.strip() and not title:
        return Skipped(where, "no text")

    metadata: dict[str, Any] = {k: json_safe(v) for k, v in record.items() if k not in _RESERVED}
    extra = record.get("metadata")
    if isinstance(extra, dict):
        metadata.update(json_safe(extra))
    elif extra is not None:
        metadata["metadata"] = json_safe(extra)
    if (
        isinstance(extra, dict)
        and "groups" in extra
        and "groups" in record
        and json_safe(record["groups"]) != json_safe(extra["groups"])
    ):
        return Skipped(where, "'groups' and 'metadata.groups' differ; keep one")
    if warnings:
        metadata["warnings"] = warnings
    # Stored metadata is a re-serialised part of the line: at most about 5 times its bytes
    # (a number such as 1e15 grows most), so short lines need no measuring.
    if len(line) * 5 > limits.max_metadata_bytes:
        try:
            check_metadata_size(metadata, limits.max_metadata_bytes)
        except LoadError as exc:
            return Skipped(where, str(exc))
    return Document(
        id=doc_id,
        title=title,
        source=f"{source}#{doc_id}",
        modified=modified,
        content_hash=hashlib.sha256(line).hexdigest(),
        kind="corpus",
        sections=(Section(trail=(), text=text),) if text.strip() else (),
        metadata=metadata,
    )
