"""Incremental refresh: unchanged documents are not re-embedded, removed ones vanish."""

from __future__ import annotations

from pathlib import Path

import pytest
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.errors import IndexMismatchError, SettingsError
from sounding.indexer.settings import IndexSettings
from sounding.indexer.store import IndexReader

LONG = "\n\n".join(
    f"Paragraph {i} about sluice gates and tide tables number {i}." for i in range(80)
)


def write(root: Path, rel: str, text: str) -> None:
    path = root / rel
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text)


@pytest.fixture
def wiki(tmp_path: Path) -> Path:
    root = tmp_path / "wiki"
    write(root, "a.md", "# Alpha\n\nFirst page about intake screens.\n")
    write(root, "sub/b.md", f"# Beta\n\n## Tides\n\n{LONG}\n")
    write(root, "c.txt", "Gamma notes\n\nThe gamma pump hums at night.\n")
    write(root, "logo.png", "not really a png")
    return root


def settings_for(tmp_path: Path, **kw) -> IndexSettings:
    return IndexSettings(index_dir=tmp_path / "idx", chunk_tokens=64, chunk_overlap=8, **kw)


def test_first_run_adds_everything_and_reports_skips(tmp_path: Path, wiki: Path) -> None:
    emb = HashingEmbedder(16)
    report = refresh_index([wiki], settings_for(tmp_path), emb)
    assert sorted(report.added) == ["a.md", "c.txt", "sub/b.md"]
    assert (report.updated, report.removed, report.unchanged) == ([], [], 0)
    assert [(s.path, "unsupported" in s.reason) for s in report.skipped] == [("logo.png", True)]
    assert report.chunks_embedded == report.chunks == emb.texts_encoded > 3
    assert report.generation == 1 and report.documents == 3


def test_unchanged_corpus_embeds_nothing(tmp_path: Path, wiki: Path) -> None:
    settings = settings_for(tmp_path)
    refresh_index([wiki], settings, HashingEmbedder(16))
    counting = HashingEmbedder(16)
    report = refresh_index([wiki], settings, counting)
    assert counting.calls == 0 and counting.texts_encoded == 0
    assert (report.added, report.updated, report.removed, report.unchanged) == ([], [], [], 3)
    assert report.generation == 1 and not report.published  # nothing changed, nothing published


def test_changed_document_reembeds_only_changed_chunks(tmp_path: Path, wiki: Path) -> None:
    settings = settings_for(tmp_path)
    first = refresh_index([wiki], settings, HashingEmbedder(16))
    write(wiki, "sub/b.md", f"# Beta\n\n## Tides\n\n{LONG}\n\n## New part\n\nFresh words here.\n")
    emb = HashingEmbedder(16)
    report = refresh_index([wiki], settings, emb)
    assert report.updated == ["sub/b.md"] and report.unchanged == 2
    assert report.chunks_embedded == emb.texts_encoded == 1
    # a.md and c.txt hold one chunk each; every old chunk of b.md is reused.
    assert report.chunks_reused == first.chunks - 2 and report.chunks == first.chunks + 1
    reader = IndexReader(settings.index_dir)
    trails = [c.trail for c in reader.document_chunks("sub/b.md")]
    assert trails[-1] == ("New part",)


def test_removed_document_disappears(tmp_path: Path, wiki: Path) -> None:
    settings = settings_for(tmp_path)
    refresh_index([wiki], settings, HashingEmbedder(16))
    (wiki / "a.md").unlink()
    report = refresh_index([wiki], settings, HashingEmbedder(16))
    assert report.removed == ["a.md"] and report.documents == 2
    reader = IndexReader(settings.index_dir)
    assert reader.document("a.md") is None and reader.document_chunks("a.md") == []
    assert reader.counts()[1] == reader.faiss_index.ntotal == report.chunks


def test_other_roots_are_kept(tmp_path: Path, wiki: Path) -> None:
    other = tmp_path / "handbook"
    write(other, "z.md", "# Zeta\n\nA page in another collection.\n")
    settings = settings_for(tmp_path)
    refresh_index([wiki], settings, HashingEmbedder(16))
    report = refresh_index([other], settings, HashingEmbedder(16))
    assert report.added == ["z.md"] and report.removed == [] and report.documents == 4
    reader = IndexReader(settings.index_dir)
    assert reader.document("z.md").collection == "handbook"
    assert reader.document("a.md").collection == "wiki"


def test_missing_path_is_a_settings_error(tmp_path: Path) -> None:
    with pytest.raises(SettingsError, match="does not exist"):
        refresh_index([tmp_path / "nope"], settings_for(tmp_path), HashingEmbedder(16))


def test_other_model_refused_then_rebuild(tmp_path: Path, wiki: Path) -> None:
    settings = settings_for(tmp_path)
    refresh_index([wiki], settings, HashingEmbedder(16))
    with pytest.raises(IndexMismatchError, match="hashing-16.*hashing-24"):
        refresh_index([wiki], settings, HashingEmbedder(24))
    report = refresh_index([wiki], settings, HashingEmbedder(24), rebuild=True)
    assert sorted(report.added) == ["a.md", "c.txt", "sub/b.md"]
    assert IndexReader(settings.index_dir).dimension == 24
