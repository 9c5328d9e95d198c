"""Loaders: walking a root, and the checks every format shares.

Size limits, empty and binary files, encodings, links, special and unreadable files,
hashes, parser crashes, and any text at all.
"""

from __future__ import annotations

import gzip
import json
import os
import sys
from pathlib import Path

import pytest
import sounding.indexer.loaders as loaders
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sounding.indexer.documents import Document
from sounding.indexer.errors import LoadError, SettingsError
from sounding.indexer.loaders import iter_root, load_file

from tests.unit.loading import RECORDS, corpus_bytes, load_one, make_pdf, skip_reason, walk, write


def test_ids_are_relative_posix_paths(tmp_path: Path) -> None:
    write(tmp_path, "runbooks/db/restore.md", "# Restore\n\nx")
    write(tmp_path, "runbooks/deploy.txt", "Deploy\nx")
    write(tmp_path, "top.html", "<p>x</p>")
    write(tmp_path, "runbooks/db/icon.png", b"\x89PNG")
    docs, skipped = walk(tmp_path)
    assert list(docs) == ["runbooks/db/restore.md", "runbooks/deploy.txt", "top.html"]
    assert all("\\" not in i for i in docs)
    assert skipped == {"runbooks/db/icon.png": "unsupported file type '.png'"}


def test_single_file_root_uses_the_file_name(tmp_path: Path) -> None:
    path = write(tmp_path, "deep/dir/notes.md", "# Notes\n\nx")
    docs, skipped = walk(path)
    assert list(docs) == ["notes.md"]
    assert docs["notes.md"].source == str(path.absolute())
    bad = write(tmp_path, "deep/dir/pic.jpg", b"x")
    assert walk(bad) == ({}, {"pic.jpg": "unsupported file type '.jpg'"})


def test_hidden_files_and_folders_are_ignored_silently(tmp_path: Path) -> None:
    write(tmp_path, ".hidden.md", "x")
    write(tmp_path, ".git/HEAD.txt", "x")
    write(tmp_path, "docs/.obsidian/config.md", "x")
    write(tmp_path, "docs/.DS_Store", b"\x00\x01")
    write(tmp_path, "docs/visible.md", "x")
    assert walk(tmp_path) == (walk(tmp_path)[0], {})
    assert list(walk(tmp_path)[0]) == ["docs/visible.md"]


def test_a_hidden_root_given_explicitly_is_walked(tmp_path: Path) -> None:
    write(tmp_path, ".wiki/page.md", "x")
    assert list(walk(tmp_path / ".wiki")[0]) == ["page.md"]


@pytest.mark.parametrize(("size", "loaded"), [(99, True), (100, True), (101, False)])
def test_size_limit(tmp_path: Path, size: int, loaded: bool) -> None:
    write(tmp_path, "big.txt", "a" * size)
    docs, skipped = walk(tmp_path, max_file_bytes=100)
    if loaded:
        assert list(docs) == ["big.txt"] and skipped == {}
    else:
        assert docs == {}
        assert skipped == {
            "big.txt": "file is 101 bytes, over the limit of 100 bytes (setting max_file_bytes)"
        }


def test_size_limit_applies_before_parsing(tmp_path: Path) -> None:
    write(tmp_path, "big.pdf", b"garbage" * 100)
    _, skipped = walk(tmp_path, max_file_bytes=10)
    assert skipped["big.pdf"].startswith("file is 700 bytes, over the limit of 10 bytes")


@pytest.mark.parametrize("limit", [0, -1])
def test_nonpositive_size_limit_is_a_settings_error(tmp_path: Path, limit: int) -> None:
    with pytest.raises(SettingsError, match="max_file_bytes"):
        list(iter_root(tmp_path, max_file_bytes=limit))


def test_missing_root_is_a_settings_error(tmp_path: Path) -> None:
    with pytest.raises(SettingsError, match="does not exist"):
        list(iter_root(tmp_path / "nope"))


@pytest.mark.parametrize("name", ["a.md", "a.txt", "a.html", "a.pdf", "a.jsonl", "a.jsonl.gz"])
@pytest.mark.parametrize("content", [b"", b"   \n\t\n"])
def test_empty_files_have_no_text(tmp_path: Path, name: str, content: bytes) -> None:
    if name.endswith(".gz"):
        content = gzip.compress(content)
    assert skip_reason(tmp_path, name, content) == "no text"


@pytest.mark.parametrize("name", ["a.md", "a.markdown", "a.txt", "a.html", "a.htm", "a.jsonl"])
def test_binary_content_in_a_text_file_is_skipped(tmp_path: Path, name: str) -> None:
    data = b"<p>looks like text</p>\x00\x00\x01\x02"
    assert skip_reason(tmp_path, name, data) == "binary content in a text file"


def test_binary_corpus_inside_gzip_is_skipped(tmp_path: Path) -> None:
    data = gzip.compress(b"\x00\x01\x02 binary")
    assert skip_reason(tmp_path, "c.jsonl.gz", data) == "binary content in a text file"


def test_nul_after_the_first_8_kib_is_not_binary(tmp_path: Path) -> None:
    doc = load_one(tmp_path, "log.txt", b"Log\n" + b"a" * 9000 + b"\x00tail")
    assert doc.text.endswith("\x00tail")


@pytest.mark.parametrize("name", ["a.md", "a.txt", "a.html"])
def test_invalid_utf8_is_replaced_with_a_warning(tmp_path: Path, name: str) -> None:
    data = b"caf\xe9 au lait"
    doc = load_one(tmp_path, name, b"<p>" + data + b"</p>" if name.endswith("html") else data)
    assert "caf\ufffd au lait" in doc.text
    assert doc.metadata["warnings"] == ["invalid UTF-8 replaced with U+FFFD"]


@pytest.mark.parametrize(
    ("data", "text"),
    [
        (b"\xef\xbb\xbfTitle\r\nline two\r\n", "Title\nline two"),
        (b"Old\rMac\rlines", "Old\nMac\nlines"),
        ("Wide\r\ntext \u00e9".encode("utf-16"), "Wide\ntext \u00e9"),
    ],
    ids=["bom-crlf", "cr", "utf16"],
)
def test_bom_and_line_ends_are_normalised(tmp_path: Path, data: bytes, text: str) -> None:
    doc = load_one(tmp_path, "x.txt", data)
    assert doc.text == text
    assert not doc.title.startswith("\ufeff")
    assert "warnings" not in doc.metadata


@pytest.mark.skipif(not hasattr(os, "symlink"), reason="needs symbolic links")
def test_symlinked_folders_are_not_followed_so_loops_end(tmp_path: Path) -> None:
    write(tmp_path, "a/page.md", "x")
    (tmp_path / "a" / "loop").symlink_to(tmp_path, target_is_directory=True)
    (tmp_path / "a" / "self").symlink_to(tmp_path / "a", target_is_directory=True)
    docs, skipped = walk(tmp_path)
    assert list(docs) == ["a/page.md"]
    assert skipped == {
        "a/loop": "symbolic link to a folder; not followed",
        "a/self": "symbolic link to a folder; not followed",
    }


@pytest.mark.skipif(not hasattr(os, "symlink"), reason="needs symbolic links")
def test_symlinked_files_inside_are_followed_others_skipped(tmp_path: Path) -> None:
    outside = write(tmp_path, "outside/secret.md", "# Secret\n\nx")
    root = tmp_path / "root"
    write(root, "pages/shared.md", "# Shared\n\nx")
    (root / "alias.md").symlink_to(root / "pages" / "shared.md")
    (root / "leak.md").symlink_to(outside)
    (root / "broken.md").symlink_to(tmp_path / "missing.md")
    (root / "cycle.md").symlink_to(root / "cycle.md")
    docs, skipped = walk(root)
    assert sorted(docs) == ["alias.md", "pages/shared.md"]
    assert docs["alias.md"].title == "Shared"
    assert skipped == {
        "broken.md": "broken symbolic link",
        "cycle.md": "broken symbolic link",
        "leak.md": "symbolic link to a file outside the indexed folder; not followed",
    }


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs FIFOs")
def test_special_files_are_skipped_without_blocking(tmp_path: Path) -> None:
    os.mkfifo(tmp_path / "pipe.txt")
    assert walk(tmp_path) == ({}, {"pipe.txt": "not a regular file"})


def test_unreadable_file_is_skipped(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    write(tmp_path, "secret.md", "x")
    write(tmp_path, "open.md", "x")

    def deny(path: Path) -> bytes:
        if path.name == "secret.md":
            raise PermissionError(13, "Permission denied", str(path))
        return path.read_bytes()

    monkeypatch.setattr(loaders, "_read_bytes", deny)
    docs, skipped = walk(tmp_path)
    assert list(docs) == ["open.md"]
    assert skipped == {"secret.md": "permission denied"}
    with pytest.raises(LoadError, match="^permission denied$"):
        load_file(tmp_path / "secret.md", "secret.md")


@pytest.mark.skipif(sys.platform == "win32" or os.geteuid() == 0, reason="root can read anything")
def test_unreadable_file_and_folder_on_disk(tmp_path: Path) -> None:
    locked_file = write(tmp_path, "locked.md", "x")
    locked_dir = tmp_path / "private"
    write(locked_dir, "inside.md", "x")
    locked_file.chmod(0)
    locked_dir.chmod(0)
    try:
        assert walk(tmp_path) == (
            {},
            {"locked.md": "permission denied", "private": "permission denied"},
        )
    finally:
        locked_dir.chmod(0o755)
        locked_file.chmod(0o644)


def test_unreadable_folder_is_skipped(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    write(tmp_path, "private/inside.md", "x")
    write(tmp_path, "public/page.md", "x")
    real_scandir = os.scandir

    def scandir(path: str | os.PathLike[str]) -> object:
        if Path(path).name == "private":
            raise PermissionError(13, "Permission denied", str(path))
        return real_scandir(path)

    monkeypatch.setattr(os, "scandir", scandir)
    docs, skipped = walk(tmp_path)
    assert list(docs) == ["public/page.md"]
    assert skipped == {"private": "permission denied"}


def test_walk_order_is_sorted_and_repeatable(tmp_path: Path) -> None:
    for rel in ["b.md", "a/z.md", "a/b/c.txt", "C.md", "a.md", "aa/x.md"]:
        write(tmp_path, rel, "x")
    first = [i.id if isinstance(i, Document) else i.path for i in iter_root(tmp_path)]
    second = [i.id if isinstance(i, Document) else i.path for i in iter_root(tmp_path)]
    assert first == second == ["C.md", "a/b/c.txt", "a/z.md", "a.md", "aa/x.md", "b.md"]


def test_content_hash_tracks_bytes_not_timestamps(tmp_path: Path) -> None:
    path = write(tmp_path, "page.md", "# Page\n\nversion one\n")
    first = load_file(path, "page.md")[0].content_hash
    os.utime(path, (1_000_000, 1_000_000))
    again = load_file(path, "page.md")[0]
    assert again.content_hash == first
    assert again.modified == 1_000_000
    path.write_bytes(b"# Page\n\nversion one\n ")  # one trailing space more
    assert load_file(path, "page.md")[0].content_hash != first


def test_parser_crash_is_a_skip_and_the_run_goes_on(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    write(tmp_path, "a.txt", "x")
    write(tmp_path, "b.md", "# B\n\nfine")

    def boom(text: str, stem: str) -> None:
        raise ValueError("unexpected state")

    monkeypatch.setattr(loaders, "parse_text", boom)
    docs, skipped = walk(tmp_path)
    assert list(docs) == ["b.md"]
    assert skipped == {"a.txt": "cannot parse text: ValueError: unexpected state"}
    with pytest.raises(LoadError, match="cannot parse text"):
        load_file(tmp_path / "a.txt", "a.txt")


@pytest.mark.parametrize("exc", [KeyboardInterrupt, MemoryError])
def test_interrupts_and_memory_errors_propagate(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, exc: type[BaseException]
) -> None:
    write(tmp_path, "a.txt", "x")

    def boom(text: str, stem: str) -> None:
        raise exc()

    monkeypatch.setattr(loaders, "parse_text", boom)
    with pytest.raises(exc):
        list(iter_root(tmp_path))


def test_metadata_of_every_kind_is_json_serialisable(tmp_path: Path) -> None:
    write(tmp_path, "a.md", "---\nwhen: 2024-01-01\nset: !!set {a, b}\nraw: !!binary aGk=\n---\nx")
    write(tmp_path, "b.html", '<meta name="keywords" content="k"><p>x</p>')
    write(tmp_path, "c.pdf", make_pdf([["x"]], author="A"))
    write(tmp_path, "d.jsonl", corpus_bytes(RECORDS))
    write(tmp_path, "e.txt", b"bad \xff")
    docs, skipped = walk(tmp_path)
    assert skipped == {}
    assert len(docs) == 7
    assert docs["a.md"].metadata == {"when": "2024-01-01", "set": ["a", "b"], "raw": "hi"}
    for doc in docs.values():
        json.dumps(doc.metadata, allow_nan=False)


@settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    suffix=st.sampled_from([".md", ".html", ".txt", ".jsonl"]),
    text=st.text(
        alphabet=st.sampled_from(list("#=-`~*_[]()<>!|/\\:\"'{}\n \tab1\u00e9")), max_size=300
    ),
)
def test_any_text_loads_or_fails_with_load_error(tmp_path: Path, suffix: str, text: str) -> None:
    path = write(tmp_path, f"fuzz{suffix}", text)
    try:
        docs = load_file(path, path.name)
    except LoadError as exc:
        assert str(exc)
        return
    for doc in docs:
        assert doc.sections and all(s.text.strip() for s in doc.sections)
        assert all(all(t for t in s.trail) for s in doc.sections)
        json.dumps(doc.metadata, allow_nan=False)
