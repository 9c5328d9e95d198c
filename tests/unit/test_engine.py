"""The engine's generations: held by requests, swapped on reload, closed by the last holder."""

from __future__ import annotations

import threading
from pathlib import Path

import pytest
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.errors import IndexStoreError
from sounding.indexer.store import DATABASE, snapshot
from sounding.service.engine import Engine
from sounding.service.settings import ServiceSettings


def _wiki(root: Path, marker: str, n: int) -> None:
    root.mkdir(exist_ok=True)
    for old in root.glob("*.md"):
        old.unlink()
    for i in range(n):
        (root / f"d{i}.md").write_text(f"# Note {i}\n\n{marker} pump {i} runs at night.\n")


@pytest.fixture
def indexed(tmp_path: Path) -> tuple[Path, ServiceSettings, HashingEmbedder]:
    root = tmp_path / "wiki"
    _wiki(root, "first", 3)
    settings = ServiceSettings(require_keys=False, index_dir=tmp_path / "idx")
    embedder = HashingEmbedder(16, seed=2)
    refresh_index([root], settings, embedder)
    return root, settings, embedder


def _engine(settings: ServiceSettings, embedder: HashingEmbedder) -> Engine:
    return Engine(settings.index_dir, embedder, settings.searcher_factory(embedder), 3600)


def test_a_held_generation_outlives_a_reload_and_closes_with_its_last_holder(
    indexed: tuple[Path, ServiceSettings, HashingEmbedder],
) -> None:
    root, settings, embedder = indexed
    engine = _engine(settings, embedder)
    old = engine.hold()
    assert old is not None and old.number == 1
    _wiki(root, "second", 5)
    refresh_index([root], settings, embedder)
    engine.reload()
    new = engine.hold()
    assert new is not None and new.number == 2 and new.reader.counts()[0] == 5
    # The request that began on generation 1 still reads generation 1, whole.
    assert not old.closed and old.reader.counts()[0] == 3
    assert "first" in old.searcher.search("pump", 1, mode="lexical")[0].text
    old.release()
    assert old.closed and not old.hold()
    with pytest.raises(IndexStoreError, match="closed"):
        old.reader.counts()  # its snapshot is closed
    new.release()
    assert not new.closed  # the engine still holds the current one
    engine.close()
    assert new.closed and engine.hold() is None


def test_releasing_more_often_than_held_is_a_bug(
    indexed: tuple[Path, ServiceSettings, HashingEmbedder],
) -> None:
    _, settings, embedder = indexed
    engine = _engine(settings, embedder)
    g = engine.hold()
    assert g is not None
    g.release()
    engine.close()
    with pytest.raises(RuntimeError, match="released more often"):
        g.release()


def test_concurrent_requests_of_one_generation_read_in_parallel(
    indexed: tuple[Path, ServiceSettings, HashingEmbedder],
) -> None:
    _, settings, embedder = indexed
    engine = _engine(settings, embedder)
    generation = engine.hold()
    assert generation is not None
    reader = generation.reader
    # Every read connection holds a transaction on the same committed generation, so a
    # request can take any of them: hold them all at once from several threads.
    inside = threading.Barrier(engine.read_connections, timeout=10)
    seen: list[int] = []

    def read() -> None:
        with reader._connection() as conn:
            inside.wait()  # all connections in use at the same moment: none serialised
            seen.append(int(conn.execute("SELECT count(*) FROM documents").fetchone()[0]))

    threads = [threading.Thread(target=read) for _ in range(engine.read_connections)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=20)
    assert seen == [3] * engine.read_connections
    generation.release()
    engine.close()


def test_snapshot_connections_are_opened_again_when_a_commit_slips_in_between(
    indexed: tuple[Path, ServiceSettings, HashingEmbedder], monkeypatch: pytest.MonkeyPatch
) -> None:
    _, settings, _ = indexed
    real = snapshot._open_snapshot
    seen = iter([1, 2, 2, 2])  # the first opening sees generations 1 and 2, the next 2 and 2

    def opened(path: Path):
        conn, _ = real(path)
        return conn, next(seen)

    monkeypatch.setattr(snapshot, "_open_snapshot", opened)
    pool = snapshot.SnapshotConnections(settings.index_dir / DATABASE, 2)
    assert pool.generation == 2 and pool.count == 2
    pool.close()
