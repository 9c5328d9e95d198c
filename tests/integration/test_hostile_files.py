"""Hostile files: a corpus of every kind of bad input, generated here in tmp_path.

Indexing it must not raise; every bad file must be skipped with the reason the
loaders give for it (indexer/loaders), and every good one indexed and
searchable. Nothing binary is committed: the corpus is written by the test.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
from sounding.indexer import loaders
from sounding.indexer.build import RefreshReport, refresh_index
from sounding.indexer.embedding import HashingEmbedder, bundled_model_path
from sounding.indexer.loaders._common import INVALID_UTF8
from sounding.indexer.loaders._html import NO_MARKUP
from sounding.indexer.loaders._pdf import ENCRYPTED
from sounding.indexer.search import Searcher
from sounding.indexer.settings import IndexSettings
from sounding.indexer.store import IndexReader

from tests.unit.loading import encrypt_pdf, make_pdf

MAX_FILE_BYTES = 4096
DEEP_LEVELS = 60

# Good documents: id -> (content, a query that must find it).
GOOD: dict[str, tuple[bytes, str]] = {
    "good/valve.md": (
        b"# Reservoir valve\n\nClose the upstream gate before unbolting the flange.\n",
        "unbolting the flange",
    ),
    "good/kiosk.txt": (
        b"Kiosk printer\n\nThe kiosk printer jams when the paper tray is overfilled.\n",
        "paper tray overfilled",
    ),
    "good/rota.html": (
        b"<html><head><title>Duty rota</title><script>var x = 'zzscript';</script></head>"
        b"<body><main><h1>Duty rota</h1><p>The weekend duty engineer carries the pager."
        b"</p></main></body></html>",
        "weekend duty engineer pager",
    ),
    "good/report.pdf": (
        make_pdf([["Quarterly pump report", "Pump seven needs new bearings"]]),
        "pump seven bearings",
    ),
    "odd names/with space.md": (
        b"# Spaces\n\nGravel filter backwash schedule.\n",
        "gravel backwash",
    ),
    "odd names/\u00fcn\u00efc\u00f8d\u00e9 \u2603.md": (
        "# Unicode\n\nSchneemann m\u00f6chte Gl\u00fchwein.\n".encode(),
        "Schneemann Glühwein",
    ),
    "odd names/quote'\"s.md": (
        b"# Quotes\n\nChlorine dosing pump calibration.\n",
        "chlorine dosing",
    ),
    "odd names/new\nline.md": (b"# Newline\n\nTurbidity sensor cleaning.\n", "turbidity sensor"),
    "odd names/-leading-dash.md": (b"# Dash\n\nHydrant flushing in spring.\n", "hydrant flushing"),
    "/".join(["deep"] * DEEP_LEVELS) + "/bottom.md": (
        b"# Bottom\n\nThe deepest folder holds the sludge lagoon survey.\n",
        "sludge lagoon survey",
    ),
    # Invalid UTF-8 is indexed with a warning, the bad byte replaced.
    "bad-encoding/latin1.md": (
        b"# Caf\xe9 menu\n\nThe canteen caf\xe9 serves soup on Fridays.\n",
        "canteen soup fridays",
    ),
    # A good file with mode 000: root ignores permissions, so for root it is indexed;
    # test_unreadable_file_is_skipped simulates the denial at the loaders' read seam.
    "unreadable/locked.md": (
        b"# Locked\n\nAeration basin blower maintenance.\n",
        "aeration blower",
    ),
}

CORPUS_LINES = [
    b'{"_id": "rec-good-1", "title": "Meter reading", "text": "Read the water meters monthly."}',
    b'{"_id": "rec-bad-json", "text": ',  # line 2: truncated
    b'["not", "an", "object"]',  # line 3
    b'{"title": "no id", "text": "orphan"}',  # line 4
    b'{"_id": "rec-no-text", "title": ""}',  # line 5
    b'{"_id": "rec-good-2", "text": "Backflow preventers are tested yearly."}',  # line 6
]


def build_corpus(root: Path) -> dict[str, str]:
    """Write every hostile case under ``root``; return {skipped path: expected reason}.

    A reason ending in ``*`` is matched as a prefix (the rest names a parser error).
    """
    expected: dict[str, str] = {}

    def write(rel: str, data: bytes) -> Path:
        path = root / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(data)
        return path

    for rel, (data, _) in GOOD.items():
        write(rel, data)
    os.chmod(root / "unreadable/locked.md", 0)

    # Binary content behind text suffixes.
    binary = bytes(range(256)) * 4
    write("bad/binary.md", binary)
    write("bad/binary.txt", b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR" + binary)
    expected["bad/binary.md"] = expected["bad/binary.txt"] = loaders.BINARY
    # Nothing to index.
    write("bad/empty.md", b"")
    write("bad/whitespace.txt", b"  \n\t\n   \r\n")
    expected["bad/empty.md"] = expected["bad/whitespace.txt"] = loaders.NO_TEXT
    # Over the size limit.
    write("bad/huge.md", b"# Huge\n\n" + b"word " * MAX_FILE_BYTES)
    size = (root / "bad/huge.md").stat().st_size
    expected["bad/huge.md"] = (
        f"file is {size} bytes, over the limit of {MAX_FILE_BYTES} bytes (setting max_file_bytes)"
    )
    # PDFs: encrypted, garbage, truncated.
    write("bad/locked.pdf", encrypt_pdf(make_pdf([["secret minutes"]]), "secret"))
    expected["bad/locked.pdf"] = ENCRYPTED
    write("bad/garbage.pdf", os.urandom(2048))
    expected["bad/garbage.pdf"] = "malformed PDF: *"
    real = make_pdf([["This PDF is cut short"]])
    write("bad/truncated.pdf", real[: len(real) // 3])
    expected["bad/truncated.pdf"] = "malformed PDF: *"
    # HTML that is not HTML, or only scripts.
    write("bad/plain.html", b"Just a sentence in a file that claims to be HTML.\n")
    expected["bad/plain.html"] = NO_MARKUP
    write(
        "bad/scripts.html",
        b"<html><head><script>document.write('x')</script></head>"
        b"<body><script src='app.js'></script><style>p{}</style></body></html>",
    )
    expected["bad/scripts.html"] = loaders.NO_TEXT
    # Links: a folder link to its parent (a loop if followed), a file link loop, a broken link.
    (root / "links").mkdir()
    os.symlink("..", root / "links/parent")
    expected["links/parent"] = "symbolic link to a folder; not followed"
    os.symlink("self.md", root / "links/self.md")
    expected["links/self.md"] = loaders.BROKEN_LINK
    os.symlink("nowhere.md", root / "links/broken.md")
    expected["links/broken.md"] = loaders.BROKEN_LINK
    # A FIFO would block a reader forever.
    os.mkfifo(root / "bad/pipe.md")
    expected["bad/pipe.md"] = "not a regular file"
    # Unsupported types.
    write("bad/photo.png", b"\x89PNG\r\n")
    expected["bad/photo.png"] = "unsupported file type '.png'"
    write("bad/Makefile", b"all:\n")
    expected["bad/Makefile"] = "unsupported file type (no file name suffix)"
    # A file name that is not UTF-8 (possible on Linux: names are bytes).
    os.makedirs(os.fsencode(root / "odd names"), exist_ok=True)
    with open(os.fsencode(root / "odd names") + b"/caf\xe9.md", "wb") as f:
        f.write(b"# Latin-1 name\n\nText.\n")
    expected["odd names/caf\ufffd.md"] = "file name is not valid UTF-8; rename the file"
    # Hidden files are ignored silently: neither indexed nor skipped.
    write(".hidden/secret.md", b"# Hidden\n\nnever indexed\n")
    write("good/.draft.md", b"# Draft\n\nnever indexed\n")
    # A corpus file with some bad lines.
    write("bulk/corpus.jsonl", b"\n".join(CORPUS_LINES) + b"\n")
    expected["bulk/corpus.jsonl:2"] = "invalid JSON: *"
    expected["bulk/corpus.jsonl:3"] = "not a JSON object"
    expected["bulk/corpus.jsonl:4"] = "record has no '_id'"
    expected["bulk/corpus.jsonl:5"] = "record has no 'text'"
    return expected


def assert_skipped_as_expected(skipped: dict[str, str], expected: dict[str, str]) -> None:
    assert set(skipped) == set(expected), (
        f"unexpected: {sorted(set(skipped) - set(expected))}; "
        f"missing: {sorted(set(expected) - set(skipped))}"
    )
    for path, reason in expected.items():
        if reason.endswith("*"):
            assert skipped[path].startswith(reason[:-1]), (path, skipped[path])
        else:
            assert skipped[path] == reason, (path, skipped[path])


@pytest.fixture(scope="module")
def indexed(tmp_path_factory: pytest.TempPathFactory):
    base = tmp_path_factory.mktemp("hostile")
    root = base / "corpus"
    root.mkdir()
    expected = build_corpus(root)
    settings = IndexSettings(index_dir=base / "index", max_file_bytes=MAX_FILE_BYTES)
    embedder = HashingEmbedder(16)
    report = refresh_index([root], settings, embedder)
    yield root, expected, settings, embedder, report
    os.chmod(root / "unreadable/locked.md", 0o600)


def test_every_bad_file_is_skipped_with_its_reason(indexed) -> None:
    _, expected, _, _, report = indexed
    assert_skipped_as_expected({s.path: s.reason for s in report.skipped}, expected)


def test_every_good_file_is_indexed_and_searchable(indexed) -> None:
    _, _, settings, embedder, report = indexed
    good = set(GOOD) | {"rec-good-1", "rec-good-2"}
    if os.geteuid() != 0:  # the chmod 000 file is readable only to root
        good.discard("unreadable/locked.md")
    assert set(report.added) == good
    reader = IndexReader(settings.index_dir)
    searcher = Searcher(reader, embedder)
    for doc_id, (_, query) in GOOD.items():
        if doc_id in good:
            hits = searcher.search(query, 3, mode="lexical")
            assert doc_id in [h.document_id for h in hits], (doc_id, query)
    hits = searcher.search("backflow preventers tested", 3, mode="lexical")
    assert hits[0].document_id == "rec-good-2"
    assert searcher.search("zzscript", 3, mode="lexical") == []  # scripts are not text


def test_invalid_utf8_is_indexed_with_a_warning(indexed) -> None:
    _, _, settings, _, _ = indexed
    doc = IndexReader(settings.index_dir).document("bad-encoding/latin1.md")
    assert doc is not None and doc.metadata["warnings"] == [INVALID_UTF8]
    assert doc.title == "Caf\ufffd menu"


def test_odd_file_names_keep_their_ids(indexed) -> None:
    root, _, settings, _, _ = indexed
    reader = IndexReader(settings.index_dir)
    for doc_id in [k for k in GOOD if k.startswith("odd names/")]:
        doc = reader.document(doc_id)
        assert doc is not None and Path(doc.source) == root / doc_id


def test_unreadable_file_is_skipped(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # chmod 000 does not stop root, so the denial is simulated at the loaders' read seam.
    root = tmp_path / "corpus"
    root.mkdir()
    (root / "locked.md").write_text("# Locked\n\nsecret\n")
    (root / "open.md").write_text("# Open\n\nreadable\n")
    real_read = loaders._read_bytes

    def read(path: Path) -> bytes:
        if path.name == "locked.md":
            raise PermissionError(13, "Permission denied", str(path))
        return real_read(path)

    monkeypatch.setattr(loaders, "_read_bytes", read)
    report = refresh_index([root], IndexSettings(index_dir=tmp_path / "index"), HashingEmbedder(16))
    assert [(s.path, s.reason) for s in report.skipped] == [("locked.md", loaders.PERMISSION)]
    assert report.added == ["open.md"]


def test_a_folder_nested_beyond_the_recursion_limit_does_not_stop_the_walk(
    tmp_path: Path,
) -> None:
    # A folder about 990 levels deep (a legal 2 KB path) would exhaust Python's default
    # limit of 1000 frames if the walk recursed per level. Shown without a 1,000-level
    # tree in the shared /tmp (which shutil.rmtree, pytest's clean-up, cannot delete):
    # a lower recursion limit instead.
    levels = 150
    root = tmp_path / "corpus"
    root.mkdir()
    (root / "top.md").write_text("# Top\n\nStill indexed.\n")
    deepest = root.joinpath(*["d"] * levels)
    deepest.mkdir(parents=True)
    (deepest / "bottom.md").write_text("# Bottom\n\ntext\n")
    depth, frame = 0, sys._getframe()
    while frame is not None:
        depth, frame = depth + 1, frame.f_back
    old_limit = sys.getrecursionlimit()
    sys.setrecursionlimit(depth + levels // 2)  # room for half the levels, as 1000 is for 990
    try:
        items = list(loaders.iter_root(root))
    finally:
        sys.setrecursionlimit(old_limit)
    assert [getattr(i, "id", None) for i in items] == [f"{'d/' * levels}bottom.md", "top.md"]


def test_a_second_run_over_the_same_corpus_changes_nothing(indexed) -> None:
    root, expected, settings, embedder, _ = indexed
    again: RefreshReport = refresh_index([root], settings, embedder)
    assert (again.added, again.updated, again.removed) == ([], [], [])
    assert_skipped_as_expected({s.path: s.reason for s in again.skipped}, expected)


@pytest.mark.slow
@pytest.mark.subprocess
def test_cli_indexes_the_corpus_and_reports_skips_without_a_traceback(tmp_path: Path) -> None:
    root = tmp_path / "corpus"
    root.mkdir()
    expected = build_corpus(root)
    env = {**os.environ, "SOUNDING_MAX_FILE_BYTES": str(MAX_FILE_BYTES)}
    try:
        proc = subprocess.run(
            [
                sys.executable,
                "-m",
                "sounding.cli",
                "index",
                str(root),
                "--index",
                str(tmp_path / "index"),
                "--json",
                "--quiet",
                "--model",
                str(bundled_model_path()),
            ],
            capture_output=True,
            text=True,
            env=env,
            timeout=600,
        )
    finally:
        os.chmod(root / "unreadable/locked.md", 0o600)
    assert proc.returncode == 0, proc.stderr
    assert "Traceback" not in proc.stderr, proc.stderr
    report = json.loads(proc.stdout)
    assert_skipped_as_expected({s["path"]: s["reason"] for s in report["skipped"]}, expected)
    assert "good/report.pdf" in report["added"] and "rec-good-2" in report["added"]
