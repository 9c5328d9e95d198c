"""Document loaders: turn the files under a root into :class:`~indexer.documents.Document` values.

Markdown, HTML, PDF, plain text and office files (Word, OpenDocument,
PowerPoint, Excel) give one document per file; a saved mail (``.eml``) gives
one, and one per attachment of a supported type; a BEIR-style
``corpus.jsonl`` (or ``.jsonl.gz``) gives one per line. :func:`iter_root`
never raises for a bad file: it yields a :class:`~indexer.documents.Skipped`
with a reason a person can act on, and carries on.
"""

from __future__ import annotations

import hashlib
import os
import stat
from collections.abc import Iterator
from pathlib import Path, PurePath

from ..documents import Document, Skipped
from ..errors import LoadError, SettingsError
from ._common import (
    DEFAULT_LIMITS,
    LoadLimits,
    Parsed,
    capped_warnings,
    check_metadata_size,
    check_text_size,
    decode_text,
    is_binary,
    short_error,
)
from ._corpus import iter_corpus
from ._formats import OFFICE_KINDS, parse_office, read_mail
from ._html import declared_charset, parse_html
from ._markdown import parse_markdown
from ._pdf import parse_pdf
from ._scanned import ocr_options
from ._text import parse_text

__all__ = [
    "DEFAULT_LIMITS",
    "SUPPORTED_SUFFIXES",
    "LoadLimits",
    "iter_root",
    "load_file",
    "parse_document",
    "upload_kind",
]

KINDS: dict[str, str] = {
    ".md": "markdown",
    ".markdown": "markdown",
    ".html": "html",
    ".htm": "html",
    ".pdf": "pdf",
    ".txt": "text",
    ".jsonl": "corpus",
    ".jsonl.gz": "corpus",
    **OFFICE_KINDS,
}
SUPPORTED_SUFFIXES: frozenset[str] = frozenset(KINDS)
# What parse_document reads: every kind but corpus files (streamed from disk only).
DOCUMENT_KINDS: frozenset[str] = frozenset(KINDS.values()) - {"corpus"}
DEFAULT_MAX_FILE_BYTES = 50 * 2**20

BINARY = "binary content in a text file"
BROKEN_LINK = "broken symbolic link"
NO_TEXT = "no text"
PERMISSION = "permission denied"


def file_suffix(name: str) -> str:
    """The lower-cased suffix that decides the loader; ``.jsonl.gz`` counts as one."""
    lower = name.lower()
    if lower.endswith(".jsonl.gz"):
        return ".jsonl.gz"
    return PurePath(lower).suffix


def upload_kind(name: str) -> str | None:
    """The kind an uploaded file named ``name`` is read as, or None (corpus files too)."""
    kind = KINDS.get(file_suffix(name))
    return kind if kind in DOCUMENT_KINDS else None


def load_file(path: Path, doc_id: str, limits: LoadLimits = DEFAULT_LIMITS) -> list[Document]:
    """Load one file as documents (one, or one per record of a corpus file).

    ``doc_id`` names the document (ignored for corpus files, whose records
    carry their own ``_id``; bad records are dropped). Raises LoadError with
    the reason when the file cannot be used.
    """
    path = Path(path)
    kind = _kind(path.name)
    st = _stat(path)
    try:
        if kind == "corpus":
            return _corpus_documents(path, doc_id, st, limits)
        found = _documents(path, doc_id, kind, _read_bytes(path), st.st_mtime, limits)
        return [d for d in found if isinstance(d, Document)]
    except (LoadError, MemoryError):
        raise
    except PermissionError as exc:
        raise LoadError(PERMISSION) from exc
    except OSError as exc:
        raise LoadError(f"cannot read file: {exc.strerror or short_error(exc)}") from exc
    except Exception as exc:  # noqa: BLE001 - a parser bug on one file must not stop a run
        raise LoadError(f"cannot parse {kind}: {short_error(exc)}") from exc


def iter_root(
    root: Path,
    *,
    max_file_bytes: int = DEFAULT_MAX_FILE_BYTES,
    limits: LoadLimits = DEFAULT_LIMITS,
) -> Iterator[Document | Skipped]:
    """Yield every document under ``root`` (a folder or one file), in sorted path order.

    Ids are paths relative to ``root`` with ``/`` separators (the file name
    for a single-file root; the record ``_id`` in corpus files). Hidden
    entries are ignored silently, symlinked folders are not followed, and
    every other file that is not loaded gives a Skipped with its reason
    (so does a document over ``limits``).
    """
    if max_file_bytes < 1:
        raise SettingsError(f"max_file_bytes={max_file_bytes} must be at least 1")
    root = Path(root)
    try:
        st = root.stat()
    except FileNotFoundError:
        if root.is_symlink():
            yield Skipped(root.name, BROKEN_LINK)
            return
        raise SettingsError(f"path to index does not exist: {root}") from None
    except PermissionError:
        yield Skipped(root.name, PERMISSION)
        return
    if stat.S_ISDIR(st.st_mode):
        yield from _walk(root, (), max_file_bytes, limits)
    elif stat.S_ISREG(st.st_mode):
        yield from _load_entry(root, root.name, st, max_file_bytes, limits)
    else:
        yield Skipped(root.name, "not a regular file")


def _scan(folder: Path, here: str) -> list[os.DirEntry[str]] | Skipped:
    """Entries of ``folder`` sorted by name, or why it cannot be read."""
    try:
        with os.scandir(folder) as it:
            return sorted(it, key=lambda e: e.name)
    except PermissionError:
        return Skipped(here, PERMISSION)
    except OSError as exc:
        return Skipped(here, f"cannot read folder: {exc.strerror or short_error(exc)}")


def _walk(
    folder: Path, parts: tuple[str, ...], limit: int, limits: LoadLimits
) -> Iterator[Document | Skipped]:
    """Depth-first walk of ``folder``, entries sorted by name so runs are repeatable.

    Iterative, with an explicit stack: a legal but absurdly deep tree must not
    exhaust Python's recursion limit and stop the whole run.
    """
    root_real = os.path.realpath(folder)
    first = _scan(folder, "/".join(parts) or ".")
    if isinstance(first, Skipped):
        yield first
        return
    stack: list[tuple[tuple[str, ...], Iterator[os.DirEntry[str]]]] = [(parts, iter(first))]
    while stack:
        parts, entries = stack[-1]
        entry = next(entries, None)
        if entry is None:
            stack.pop()
            continue
        if entry.name.startswith("."):
            continue  # .git, .obsidian, editor swap files: never content
        rel = "/".join((*parts, entry.name))
        path = Path(entry.path)
        try:
            if entry.is_symlink():
                try:
                    st = os.stat(entry.path)
                except PermissionError:
                    yield Skipped(rel, PERMISSION)
                    continue
                except OSError:  # missing target, or a loop of links
                    yield Skipped(rel, BROKEN_LINK)
                    continue
                if stat.S_ISDIR(st.st_mode):
                    # Following folder links can loop forever or leave the root.
                    yield Skipped(rel, "symbolic link to a folder; not followed")
                elif not os.path.realpath(entry.path).startswith(root_real + os.sep):
                    # A link out of the exported tree could expose any file the
                    # indexer's user can read; only the tree's own files count.
                    yield Skipped(
                        rel, "symbolic link to a file outside the indexed folder; not followed"
                    )
                elif stat.S_ISREG(st.st_mode):
                    yield from _load_entry(path, rel, st, limit, limits)
                else:
                    yield Skipped(rel, "not a regular file")
            elif entry.is_dir(follow_symlinks=False):
                below = _scan(path, rel)
                if isinstance(below, Skipped):
                    yield below
                else:
                    stack.append(((*parts, entry.name), iter(below)))
            elif entry.is_file(follow_symlinks=False):
                st = entry.stat(follow_symlinks=False)
                yield from _load_entry(path, rel, st, limit, limits)
            else:
                yield Skipped(rel, "not a regular file")  # FIFOs would block a read
        except PermissionError:
            yield Skipped(rel, PERMISSION)
        except OSError as exc:
            yield Skipped(rel, f"cannot read file: {exc.strerror or short_error(exc)}")


def _load_entry(
    path: Path, rel: str, st: os.stat_result, limit: int, limits: LoadLimits
) -> Iterator[Document | Skipped]:
    """Documents of one regular file, or Skipped entries saying why not."""
    try:
        rel.encode("utf-8")
    except UnicodeEncodeError:
        shown = rel.encode("utf-8", "surrogateescape").decode("utf-8", "replace")
        yield Skipped(shown, "file name is not valid UTF-8; rename the file")
        return
    try:
        kind = _kind(path.name)
    except LoadError as exc:
        yield Skipped(rel, str(exc))
        return
    # Corpus files are streamed line by line, so their size costs no memory;
    # the limit guards the formats read whole.
    if st.st_size > limit and kind != "corpus":
        yield Skipped(
            rel,
            f"file is {st.st_size} bytes, over the limit of {limit} bytes (setting max_file_bytes)",
        )
        return
    try:
        if kind == "corpus":
            yield from iter_corpus(path, rel, os.path.abspath(path), st.st_mtime, limits)
        else:
            yield from _documents(path, rel, kind, _read_bytes(path), st.st_mtime, limits)
    except LoadError as exc:
        yield Skipped(rel, str(exc))
    except MemoryError:
        raise
    except PermissionError:
        yield Skipped(rel, PERMISSION)
    except OSError as exc:
        yield Skipped(rel, f"cannot read file: {exc.strerror or short_error(exc)}")
    except Exception as exc:  # noqa: BLE001 - a parser bug on one file must not stop a run
        yield Skipped(rel, f"cannot parse {kind}: {short_error(exc)}")


def _kind(name: str) -> str:
    suffix = file_suffix(name)
    if suffix in KINDS:
        return KINDS[suffix]
    if not suffix:
        raise LoadError("unsupported file type (no file name suffix)")
    raise LoadError(f"unsupported file type '{suffix}'")


def _stat(path: Path) -> os.stat_result:
    """``stat`` of ``path`` with failures as LoadError."""
    try:
        st = path.stat()
    except FileNotFoundError:
        raise LoadError(BROKEN_LINK if path.is_symlink() else "file not found") from None
    except PermissionError:
        raise LoadError(PERMISSION) from None
    if not stat.S_ISREG(st.st_mode):
        raise LoadError("not a regular file")
    return st


def _read_bytes(path: Path) -> bytes:
    """The file's bytes (a seam for tests that simulate unreadable files)."""
    return path.read_bytes()


def _corpus_documents(
    path: Path, rel: str, st: os.stat_result, limits: LoadLimits
) -> list[Document]:
    """All good records of a corpus file; LoadError when there are none."""
    docs: list[Document] = []
    first_problem: Skipped | None = None
    for item in iter_corpus(path, rel, os.path.abspath(path), st.st_mtime, limits):
        if isinstance(item, Document):
            docs.append(item)
        elif first_problem is None:
            first_problem = item
    if not docs:
        assert first_problem is not None  # iter_corpus raises when there are no records
        raise LoadError(
            f"no valid records (line {first_problem.path.rsplit(':', 1)[-1]}: "
            f"{first_problem.reason})"
        )
    return docs


def _documents(
    path: Path, doc_id: str, kind: str, data: bytes, modified: float, limits: LoadLimits
) -> list[Document | Skipped]:
    """Parse the bytes of a non-corpus file into documents (a mail's attachments are
    documents of their own, or Skipped); LoadError if the file is unusable."""
    found: list[Document | Skipped] = []
    parse_document(
        data,
        kind,
        doc_id=doc_id,
        name=path.name,
        source=os.path.abspath(path),
        modified=modified,
        limits=limits,
        into=found,
    )
    return found


def parse_document(
    data: bytes,
    kind: str,
    *,
    doc_id: str,
    name: str,
    source: str,
    modified: float,
    limits: LoadLimits = DEFAULT_LIMITS,
    into: list[Document | Skipped] | None = None,
) -> Document:
    """Parse one document's bytes (``kind``: one of DOCUMENT_KINDS, e.g. markdown or pdf).

    What a file on disk goes through, for documents that arrive otherwise
    (pushed over HTTP). ``name`` gives the fallback title; LoadError with the
    reason when the bytes are unusable, when the document's access metadata
    cannot be read with certainty, or when it is over ``limits``. A mail's
    readable attachments become sections of it (one id for a push); with
    ``into``, they are documents of their own (ids under ``doc_id``), appended
    there after the message, with a Skipped for each one not read.
    """
    if kind not in DOCUMENT_KINDS:
        raise LoadError(
            f"unsupported kind {kind!r}; use one of {', '.join(sorted(DOCUMENT_KINDS))}"
        )
    if not data.strip():
        raise LoadError(NO_TEXT)
    stem = PurePath(name).stem
    warnings: list[str] = []
    attachments: list[Document | Skipped] = []
    if kind == "pdf":
        parsed: Parsed = parse_pdf(data, stem, max_chars=limits.max_chars, **ocr_options(limits))
    elif kind == "mail":
        common = {"source": source, "modified": modified, "limits": limits}
        parsed, attachments = read_mail(data, stem, doc_id, KINDS, parse_document, into, common)
    elif kind in OFFICE_KINDS.values():
        parsed = parse_office(data, kind, stem, limits)
    else:
        if is_binary(data):
            raise LoadError(BINARY)
        charset = declared_charset(data) if kind == "html" else None
        text, warnings = decode_text(data, charset)
        if kind == "markdown":
            parsed = parse_markdown(text, stem, max_front_matter_bytes=limits.max_metadata_bytes)
        elif kind == "html":
            parsed = parse_html(text, stem)
        else:
            parsed = parse_text(text, stem)
    if not parsed.sections:
        raise LoadError(NO_TEXT)
    check_text_size(parsed.sections, limits.max_chars)
    metadata = dict(parsed.metadata)
    warnings += parsed.warnings
    if warnings:
        metadata["warnings"] = capped_warnings(warnings)
    check_metadata_size(metadata, limits.max_metadata_bytes)
    document = Document(
        id=doc_id,
        title=parsed.title,
        source=source,
        modified=modified,
        content_hash=hashlib.sha256(data).hexdigest(),
        kind=kind,
        sections=tuple(parsed.sections),
        metadata=metadata,
    )
    if into is not None:
        into += [document, *attachments]
    return document
