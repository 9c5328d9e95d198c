"""``sounding check``: damage of each kind is found, and repaired where it is derived."""

from __future__ import annotations

import shutil
import sqlite3
from collections.abc import Callable
from pathlib import Path

import pytest
from sounding.indexer.build import refresh_index
from sounding.indexer.check import check_index, repair_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.search import Searcher
from sounding.indexer.settings import IndexSettings
from sounding.indexer.store import DATABASE, IndexReader


@pytest.fixture(scope="module")
def wiki(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("wiki")
    for i in range(12):
        (root / f"p{i}.md").write_text(f"# Page {i}\n\n## Part\n\nGate {i} opens at dawn.\n")
    return root


@pytest.fixture(scope="module")
def pristine(wiki: Path) -> Path:
    root = wiki
    idx = root.parent / "pristine-idx"
    refresh_index([root], IndexSettings(index_dir=idx), HashingEmbedder(16))
    return idx


@pytest.fixture
def idx(pristine: Path, tmp_path: Path) -> Path:
    target = tmp_path / "idx"
    shutil.copytree(pristine, target)
    return target


def _sql(idx: Path, statement: str) -> None:
    conn = sqlite3.connect(idx / DATABASE)
    conn.execute(statement)
    conn.commit()
    conn.close()


DAMAGE: dict[str, tuple[Callable[[Path], None], str]] = {
    "vector file deleted": (lambda i: (i / "vectors-1.faiss").unlink(), "missing or unreadable"),
    "vector file garbled": (
        lambda i: (i / "vectors-1.faiss").write_bytes(b"junk"),
        "missing or unreadable",
    ),
    "fts row deleted": (
        lambda i: _sql(i, "DELETE FROM lexical_1 WHERE rowid = (SELECT min(id) FROM chunks)"),
        "lexical (FTS5) index lacks 1 chunks",
    ),
    "fts row extra": (
        lambda i: _sql(i, "INSERT INTO lexical_1 (rowid, body) VALUES (99999, 'ghost')"),
        "holds 1 entries with no chunk",
    ),
    "chunks of a document gone": (
        lambda i: _sql(i, "DELETE FROM chunks WHERE document_id = 'p3.md'"),
        "1 documents have no chunks",
    ),
    "temp file left": (
        lambda i: (i / ".vectors-2.faiss.tmp").write_bytes(b"half"),
        "left over by an interrupted run",
    ),
}


def test_a_fresh_index_is_consistent(pristine: Path) -> None:
    assert check_index(pristine).problems == []


@pytest.mark.parametrize("case", list(DAMAGE))
def test_damage_is_found_and_repaired(idx: Path, case: str) -> None:
    damage, expected = DAMAGE[case]
    damage(idx)
    found = check_index(idx)
    assert not found.ok and any(expected in p for p in found.problems), found.problems
    fixed = repair_index(idx)
    assert fixed.ok, fixed.problems
    assert fixed.repaired
    searcher = Searcher(IndexReader(idx), HashingEmbedder(16))
    for mode in ("dense", "lexical", "hybrid"):
        assert searcher.search("gate dawn", 3, mode=mode)


def test_repair_then_reindex_restores_every_document(idx: Path, wiki: Path) -> None:
    _sql(idx, "DELETE FROM chunks WHERE document_id = 'p3.md'")
    repair_index(idx)
    report = refresh_index([wiki], IndexSettings(index_dir=idx), HashingEmbedder(16))
    assert report.added == ["p3.md"] and report.documents == 12
    assert check_index(idx).ok
