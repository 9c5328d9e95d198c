"""Loaders: the API surface.

Supported suffixes, kinds, document fields, and load_file's errors.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import pytest
from sounding.indexer.documents import Section
from sounding.indexer.errors import LoadError
from sounding.indexer.loaders import SUPPORTED_SUFFIXES, load_file

from tests.unit.loading import load_one, make_pdf, write


def test_supported_suffixes_are_exactly_the_documented_ones() -> None:
    assert (
        frozenset({".md", ".markdown", ".html", ".htm", ".pdf", ".txt", ".jsonl", ".jsonl.gz"})
        | {".docx", ".odt", ".pptx", ".odp", ".xlsx", ".ods", ".eml"}
        == SUPPORTED_SUFFIXES
    )


@pytest.mark.parametrize(
    ("name", "content", "kind"),
    [
        ("a.md", "# A\n\nbody", "markdown"),
        ("a.markdown", "body", "markdown"),
        ("A.MD", "body", "markdown"),
        ("a.html", "<p>body</p>", "html"),
        ("a.HTM", "<p>body</p>", "html"),
        ("a.txt", "body", "text"),
        ("a.pdf", make_pdf([["body"]]), "pdf"),
    ],
)
def test_kind_follows_the_suffix_case_insensitively(
    tmp_path: Path, name: str, content: str | bytes, kind: str
) -> None:
    doc = load_one(tmp_path, name, content)
    assert doc.kind == kind
    assert "body" in doc.text


def test_document_fields_for_a_file(tmp_path: Path) -> None:
    path = write(tmp_path, "notes/a.txt", "Title line\nbody\n")
    (doc,) = load_file(path, "notes/a.txt")
    assert doc.id == "notes/a.txt"
    assert doc.source == str(path.absolute())
    assert Path(doc.source).is_absolute()
    assert doc.modified == path.stat().st_mtime
    assert doc.content_hash == hashlib.sha256(path.read_bytes()).hexdigest()
    assert doc.sections == (Section(trail=(), text="Title line\nbody"),)
    assert doc.metadata == {}


@pytest.mark.parametrize(
    ("name", "reason"),
    [
        ("a.png", "unsupported file type '.png'"),
        ("archive.gz", "unsupported file type '.gz'"),
        ("notes.md~", "unsupported file type '.md~'"),
        ("Makefile", "unsupported file type (no file name suffix)"),
    ],
)
def test_load_file_rejects_unsupported_suffixes(tmp_path: Path, name: str, reason: str) -> None:
    with pytest.raises(LoadError) as err:
        load_file(write(tmp_path, name, "text"), name)
    assert str(err.value) == reason


def test_load_file_on_a_missing_file_raises_load_error(tmp_path: Path) -> None:
    with pytest.raises(LoadError, match="file not found"):
        load_file(tmp_path / "gone.md", "gone.md")
