"""Cron safety: one writer at a time, dead holders taken over, a time limit."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.errors import IndexLockedError
from sounding.indexer.lock import LOCK_FILE, IndexLock
from sounding.indexer.settings import IndexSettings
from sounding.indexer.store import IndexReader

from sounding.cli import cli

HOLD = """
import sys, time
from sounding.indexer.lock import IndexLock
with IndexLock(sys.argv[1]):
    print("held", flush=True)
    time.sleep(60)
"""


@pytest.fixture
def wiki(tmp_path: Path) -> Path:
    """30 short pages: what a lock test indexes while the lock is held, or not."""
    root = tmp_path / "wiki"
    root.mkdir()
    for i in range(30):
        (root / f"page-{i}.md").write_text(f"# Page {i}\n\nWords about topic {i}.\n")
    return root


@pytest.fixture
def long_wiki(tmp_path: Path) -> Path:
    """30 long pages: many chunks, so a run passes several checkpoints."""
    root = tmp_path / "long-wiki"
    root.mkdir()
    for i in range(30):
        (root / f"page-{i}.md").write_text(f"# Page {i}\n\nWords about topic {i}.\n" * 200)
    return root


@pytest.mark.subprocess
def test_second_writer_fails_at_once_naming_the_holder(tmp_path: Path, wiki: Path) -> None:
    idx = tmp_path / "idx"
    holder = subprocess.Popen(
        [sys.executable, "-c", HOLD, str(idx)], stdout=subprocess.PIPE, text=True
    )
    try:
        assert holder.stdout.readline().strip() == "held"
        with pytest.raises(IndexLockedError, match=f"pid {holder.pid}") as err:
            refresh_index([wiki], IndexSettings(index_dir=idx), HashingEmbedder(16))
        assert err.value.exit_code == 75
        assert not (idx / "manifest.json").exists()
    finally:
        holder.kill()
        holder.wait()


@pytest.mark.subprocess
def test_lock_of_a_killed_process_is_taken_over(tmp_path: Path, wiki: Path) -> None:
    idx = tmp_path / "idx"
    holder = subprocess.Popen(
        [sys.executable, "-c", HOLD, str(idx)], stdout=subprocess.PIPE, text=True
    )
    assert holder.stdout.readline().strip() == "held"
    holder.kill()  # SIGKILL: no clean-up code runs
    holder.wait()
    assert json.loads((idx / LOCK_FILE).read_text())["pid"] == holder.pid
    report = refresh_index([wiki], IndexSettings(index_dir=idx), HashingEmbedder(16))
    assert report.lock_taken_over and report.documents == 30


def test_lock_is_released_after_a_run_and_on_error(tmp_path: Path, wiki: Path) -> None:
    idx = tmp_path / "idx"
    refresh_index([wiki], IndexSettings(index_dir=idx), HashingEmbedder(16))
    with pytest.raises(Exception, match="hashing-16"):
        refresh_index([wiki], IndexSettings(index_dir=idx), HashingEmbedder(24))
    with IndexLock(idx) as lock:
        assert lock.took_over is None
    assert (idx / LOCK_FILE).read_text() == ""


@pytest.mark.subprocess
def test_cli_exits_75_with_one_line_when_locked(tmp_path: Path, wiki: Path) -> None:
    idx = tmp_path / "idx"
    holder = subprocess.Popen(
        [sys.executable, "-c", HOLD, str(idx)], stdout=subprocess.PIPE, text=True
    )
    try:
        assert holder.stdout.readline().strip() == "held"
        unset: dict[str, str | None] = {k: None for k in os.environ if k.startswith("SOUNDING_")}
        proc = CliRunner(env=unset).invoke(cli, ["index", str(wiki), "--index", str(idx)])
        assert proc.exit_code == 75
        lines = proc.stderr.strip().splitlines()
        assert len(lines) == 1 and "being updated by another" in lines[0]
    finally:
        holder.kill()
        holder.wait()


@pytest.mark.slow  # seconds each: the fast loop stays under a minute
def test_max_runtime_stops_at_a_checkpoint_and_the_next_run_finishes(
    tmp_path: Path, long_wiki: Path
) -> None:
    wiki = long_wiki
    settings = IndexSettings(index_dir=tmp_path / "idx", chunk_tokens=64, chunk_overlap=0)
    first = refresh_index([wiki], settings, HashingEmbedder(16), max_runtime=0.0)
    assert first.stopped_early and first.pending_left > 0
    reader = IndexReader(settings.index_dir)
    # What was published is whole: every stored document has all its chunks and vectors.
    docs, chunks = reader.counts()
    assert 0 < docs == first.documents < 30 and chunks == reader.faiss_index.ntotal > 0
    second = refresh_index([wiki], settings, HashingEmbedder(16))
    assert not second.stopped_early and second.documents == 30
    assert len(second.added) == first.pending_left and second.unchanged == docs
