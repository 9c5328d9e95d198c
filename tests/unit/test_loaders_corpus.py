"""Loaders: corpus.jsonl, plain or gzip.

Records, bad lines, encodings, truncation, streaming.
"""

from __future__ import annotations

import gzip
import hashlib
from pathlib import Path

import pytest
from sounding.indexer.documents import Document, Section, Skipped
from sounding.indexer.errors import LoadError
from sounding.indexer.loaders import iter_root, load_file

from tests.unit.loading import RECORDS, corpus_bytes, skip_reason, walk, write


@pytest.mark.parametrize("name", ["corpus.jsonl", "corpus.jsonl.gz", "CORPUS.JSONL"])
def test_corpus_records_become_documents(tmp_path: Path, name: str) -> None:
    raw = corpus_bytes(RECORDS)
    path = write(tmp_path / "root", name, gzip.compress(raw) if name.endswith(".gz") else raw)
    docs, skipped = walk(tmp_path / "root")
    assert skipped == {}
    assert list(docs) == ["d1", "d2", "3"]
    d1, d2, d3 = docs.values()
    assert (d1.title, d2.title, d3.title) == ("Aspirin", "", "")
    assert d1.sections == (Section(trail=(), text="Aspirin reduces fever."),)
    assert d1.source == f"{path.absolute()}#d1"
    assert {d.kind for d in docs.values()} == {"corpus"}
    assert d1.metadata == {"url": "http://a"}
    assert d2.metadata == {"year": 2020}
    assert d3.metadata == {}
    assert d1.modified == path.stat().st_mtime
    lines = raw.split(b"\n")
    assert [d.content_hash for d in docs.values()] == [
        hashlib.sha256(line).hexdigest() for line in lines[:3]
    ]


def test_gzip_and_plain_corpus_give_the_same_hashes(tmp_path: Path) -> None:
    raw = corpus_bytes(RECORDS)
    plain = load_file(write(tmp_path, "c.jsonl", raw), "c.jsonl")
    packed = load_file(write(tmp_path, "c.jsonl.gz", gzip.compress(raw)), "c.jsonl.gz")
    assert [d.content_hash for d in plain] == [d.content_hash for d in packed]
    assert [d.id for d in plain] == [d.id for d in packed] == ["d1", "d2", "3"]


@pytest.mark.parametrize(
    ("line", "reason"),
    [
        (b"{not json", "invalid JSON: "),
        (b'["a", "list"]', "not a JSON object"),
        (b'{"title": "t", "text": "x"}', "record has no '_id'"),
        (b'{"_id": "x9", "title": "t"}', "record has no 'text'"),
        (b'{"_id": "x9", "text": 5}', "'text' must be a string"),
        (b'{"_id": ["x"], "text": "x"}', "'_id' must be a non-empty string"),
        (b'{"_id": "", "text": "x"}', "'_id' must be a non-empty string"),
        (b'{"_id": true, "text": "x"}', "'_id' must be a non-empty string"),
        (b'{"_id": "x9", "title": "", "text": "  "}', "no text"),
    ],
)
def test_bad_corpus_line_is_skipped_with_its_line_number(
    tmp_path: Path, line: bytes, reason: str
) -> None:
    raw = corpus_bytes([RECORDS[0], b"", line, RECORDS[1]])
    write(tmp_path / "root", "sub/corpus.jsonl", raw)
    docs, skipped = walk(tmp_path / "root")
    assert list(docs) == ["d1", "d2"]
    assert list(skipped) == ["sub/corpus.jsonl:3"]
    assert skipped["sub/corpus.jsonl:3"].startswith(reason)


def test_corpus_crlf_bom_and_invalid_utf8_per_record(tmp_path: Path) -> None:
    raw = (
        b'\xef\xbb\xbf{"_id": "a", "text": "line one\\r\\nline two"}\r\n'
        b'{"_id": "b", "text": "bad \xff byte"}\r\n'
    )
    docs = load_file(write(tmp_path, "c.jsonl", raw), "ignored")
    assert [d.id for d in docs] == ["a", "b"]
    assert docs[0].text == "line one\nline two"
    assert "warnings" not in docs[0].metadata
    assert docs[1].text == "bad \ufffd byte"
    assert docs[1].metadata["warnings"] == ["invalid UTF-8 replaced with U+FFFD"]


def test_title_only_corpus_record_is_a_document_without_sections(tmp_path: Path) -> None:
    # Old test collections (CACM, for one) hold records that are only a title.
    raw = corpus_bytes([b'{"_id": "t1", "title": "Parallel  sorting", "text": ""}'])
    (doc,) = load_file(write(tmp_path, "c.jsonl", raw), "c.jsonl")
    assert (doc.title, doc.sections, doc.text) == ("Parallel sorting", (), "")


def test_corpus_title_is_never_invented(tmp_path: Path) -> None:
    docs = load_file(write(tmp_path, "c.jsonl", corpus_bytes([RECORDS[1]])), "c.jsonl")
    assert docs[0].title == ""


def test_load_file_on_a_corpus_drops_bad_lines(tmp_path: Path) -> None:
    path = write(tmp_path, "c.jsonl", corpus_bytes([RECORDS[0], b"{oops", RECORDS[2]]))
    assert [d.id for d in load_file(path, "c.jsonl")] == ["d1", "3"]


def test_load_file_on_a_corpus_without_good_records_raises(tmp_path: Path) -> None:
    path = write(tmp_path, "c.jsonl", b"{oops\n[]\n")
    with pytest.raises(LoadError, match=r"^no valid records \(line 1: invalid JSON"):
        load_file(path, "c.jsonl")


@pytest.mark.parametrize("content", [b"", b"\n\n  \n"])
def test_corpus_without_records_has_no_text(tmp_path: Path, content: bytes) -> None:
    assert skip_reason(tmp_path, "c.jsonl", content) == "no text"


def test_gzip_that_is_not_gzip_is_skipped(tmp_path: Path) -> None:
    reason = skip_reason(tmp_path, "c.jsonl.gz", b"not gzip at all")
    assert reason.startswith("corrupt gzip file: BadGzipFile: ")


def test_truncated_gzip_corpus_keeps_the_records_before_the_damage(tmp_path: Path) -> None:
    records = [{"_id": f"d{i}", "text": f"text {i} " * 30} for i in range(2000)]
    write(tmp_path / "root", "c.jsonl.gz", gzip.compress(corpus_bytes(records))[:-30])
    items = list(iter_root(tmp_path / "root"))
    docs = [i for i in items if isinstance(i, Document)]
    assert 0 < len(docs) < 2000
    assert [d.id for d in docs] == [f"d{i}" for i in range(len(docs))]
    assert isinstance(items[-1], Skipped) and items[-1].path == "c.jsonl.gz"
    assert items[-1].reason.startswith("corrupt gzip file (after line ")


def test_large_corpus_streams_every_record(tmp_path: Path) -> None:
    records = [{"_id": f"doc{i}", "title": f"T{i}", "text": f"text {i} " * 20} for i in range(5000)]
    write(tmp_path / "root", "corpus.jsonl.gz", gzip.compress(corpus_bytes(records)))
    ids = [item.id for item in iter_root(tmp_path / "root") if isinstance(item, Document)]
    assert ids == [f"doc{i}" for i in range(5000)]
