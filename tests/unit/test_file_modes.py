"""Everything sounding writes is owner-only, whatever the umask and whether the folder existed.

The index folder 0700; sounding.db and its -wal/-shm, manifest.json, last-run.json, the
vector file, the lock, judgments.db (and its WAL files) and a judgments export 0600.
``sounding check`` reports looser modes; ``--repair`` tightens them.
"""

from __future__ import annotations

import os
import sqlite3
import stat
from collections.abc import Iterator
from contextlib import closing
from pathlib import Path

import pytest
from sounding.indexer.build import refresh_index
from sounding.indexer.check import check_index, repair_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.judgments import JudgmentStore
from sounding.indexer.settings import IndexSettings


def mode(path: Path) -> int:
    return stat.S_IMODE(path.stat().st_mode)


@pytest.fixture
def umask_022() -> Iterator[None]:
    old = os.umask(0o022)
    try:
        yield
    finally:
        os.umask(old)


def build(tmp_path: Path) -> IndexSettings:
    root = tmp_path / "wiki"
    root.mkdir()
    (root / "pay.md").write_text("---\ngroups: [hr]\n---\n# Pay\n\nBand C earns more.\n")
    index_dir = tmp_path / "idx"
    index_dir.mkdir(mode=0o755)  # made by the user first, as the finding did
    os.chmod(index_dir, 0o755)
    settings = IndexSettings(index_dir=index_dir, chunk_tokens=64, chunk_overlap=8)
    refresh_index([root], settings, HashingEmbedder(16))
    return settings


def test_an_index_in_a_folder_the_user_made_is_owner_only(tmp_path: Path, umask_022) -> None:
    settings = build(tmp_path)
    index_dir = settings.index_dir
    assert mode(index_dir) == 0o700
    names = {p.name for p in index_dir.iterdir()}
    assert {"sounding.db", "manifest.json", "last-run.json", ".lock"} <= names
    assert any(n.startswith("vectors-") for n in names)
    assert {n: mode(index_dir / n) for n in names} == {n: 0o600 for n in names}
    assert check_index(index_dir).ok


def test_existing_looser_files_are_tightened_by_the_next_run(tmp_path: Path, umask_022) -> None:
    settings = build(tmp_path)
    db = settings.index_dir / "sounding.db"
    os.chmod(db, 0o644)
    os.chmod(settings.index_dir, 0o755)
    refresh_index([tmp_path / "wiki"], settings, HashingEmbedder(16))
    assert mode(settings.index_dir) == 0o700 and mode(db) == 0o600
    # SQLite gives the -wal and -shm files the database file's mode, readers' too.
    with closing(sqlite3.connect(db)) as conn:
        conn.execute("SELECT count(*) FROM documents").fetchone()
        wal = [Path(f"{db}{suffix}") for suffix in ("-wal", "-shm")]
        assert [mode(p) for p in wal] == [0o600, 0o600]


def test_judgments_and_their_export_are_owner_only(tmp_path: Path, umask_022) -> None:
    store = JudgmentStore(tmp_path / "judge" / "judgments.db")
    store.record("salary bands for HR", "hr/pay.md", 3)
    out = tmp_path / "team-set"
    store.export(out)
    files = list((tmp_path / "judge").iterdir())  # while open: the WAL files exist
    assert {p.name for p in files} == {"judgments.db", "judgments.db-wal", "judgments.db-shm"}
    assert [mode(p) for p in files] == [0o600] * 3
    assert mode(tmp_path / "judge") == 0o700
    store.close()
    assert mode(out) == 0o700
    assert [mode(out / n) for n in ("queries.jsonl", "qrels.tsv")] == [0o600, 0o600]
    # An export over older, looser files tightens them too.
    os.chmod(out / "qrels.tsv", 0o644)
    store = JudgmentStore(tmp_path / "judge" / "judgments.db")
    store.export(out)
    store.close()
    assert mode(out / "qrels.tsv") == 0o600


def test_check_reports_looser_modes_and_repair_tightens_them(tmp_path: Path, umask_022) -> None:
    settings = build(tmp_path)
    os.chmod(settings.index_dir, 0o755)
    os.chmod(settings.index_dir / "sounding.db", 0o644)
    problems = check_index(settings.index_dir).problems
    assert len(problems) == 1 and "readable by other accounts" in problems[0]
    assert (
        "the index folder (mode 0755)" in problems[0] and "sounding.db (mode 0644)" in problems[0]
    )
    report = repair_index(settings.index_dir)
    assert report.ok and len(report.repaired) == 1 and "owner-only" in report.repaired[0]
    assert check_index(settings.index_dir).ok
    assert mode(settings.index_dir) == 0o700
    assert {mode(p) for p in settings.index_dir.iterdir()} == {0o600}
