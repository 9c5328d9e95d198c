"""The pipelined folder run (a producer thread walks and chunks while the caller embeds).

It must build exactly the index the sequential path builds, report the same
things in the same order, and leave the last generation intact when the walk
fails; the chunking tokenizer read from ``tokenizer.json`` must cut exactly
where the model's Hugging Face tokenizer does.
"""

from __future__ import annotations

import dataclasses
import threading
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from sounding.indexer import pipeline
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder, SentenceTransformerEmbedder
from sounding.indexer.settings import IndexSettings
from sounding.indexer.store import IndexReader

REPO = Path(__file__).resolve().parents[2]
DEMO = REPO / "demo_corpus"


def snapshot(index_dir: Path) -> tuple[object, ...]:
    """Every document, chunk and vector of an index, comparable with ==."""
    reader = IndexReader(index_dir)
    try:
        ids = sorted(set(reader.chunk_documents().values()))
        # When each was written differs between two runs; everything else must not.
        docs = [repr(dataclasses.replace(reader.document(i), indexed_at=0)) for i in ids]
        chunks = [repr(reader.document_chunks(i)) for i in ids]
        chunk_ids, vectors = reader.chunk_vectors()
        return docs, chunks, np.asarray(chunk_ids).tolist(), np.asarray(vectors).tobytes()
    finally:
        reader.close()


def report_json(report: object) -> dict[str, object]:
    out = dict(report.to_json())  # type: ignore[attr-defined]
    out.pop("seconds", None)
    return out


@pytest.mark.slow  # seconds each: the fast loop stays under a minute
def test_pipelined_run_builds_the_sequential_index(tmp_path: Path) -> None:
    runs = {}
    for pipelined in (False, True):
        settings = IndexSettings(index_dir=tmp_path / f"idx-{pipelined}", chunk_tokens=64)
        report = refresh_index([DEMO], settings, HashingEmbedder(16), pipelined=pipelined)
        runs[pipelined] = (snapshot(settings.index_dir), report_json(report))
    assert runs[True][0] == runs[False][0]
    assert runs[True][1] == runs[False][1]
    assert runs[True][1]["chunks"] > 100  # type: ignore[operator]


def test_pipelined_refresh_reports_like_the_sequential_one(tmp_path: Path) -> None:
    """A second run with a change, a removal and a relabel: same report either way."""
    reports = {}
    for pipelined in (False, True):
        root = small_wiki(tmp_path / f"wiki-{pipelined}" / "wiki", 30)
        settings = IndexSettings(index_dir=tmp_path / f"idx-{pipelined}", chunk_tokens=64)
        refresh_index([root], settings, HashingEmbedder(16), pipelined=pipelined)
        (root / "p03.md").write_text("# Page 3\n\nNew text about sluices.\n")
        (root / "p07.md").unlink()
        (root / "p11.md").write_text("---\ntags: [ops]\n---\n# Page 11\n\nText of page 11.\n")
        (root / "p12.md").write_text(
            "---\ntags: [ops]\n---\n# Page 12\n\nText of page 12 about pumps.\n"
        )
        report = refresh_index([root], settings, HashingEmbedder(16), pipelined=pipelined)
        reports[pipelined] = report_json(report)
    assert reports[True] == reports[False]


def small_wiki(root: Path, pages: int = 40) -> Path:
    root.mkdir(parents=True)
    for i in range(pages):
        (root / f"p{i:02}.md").write_text(f"# Page {i}\n\nText of page {i} about pumps.\n")
    return root


def _failing_walk(real: object) -> object:
    def iter_root(root: Path, **kw: object) -> Iterator[object]:
        for n, item in enumerate(real(root, **kw)):  # type: ignore[operator]
            if n == 20:
                raise RuntimeError("a parser bug on a hostile file")
            yield item

    return iter_root


def test_failure_in_the_walk_keeps_the_last_generation(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    wiki = small_wiki(tmp_path / "wiki")
    settings = IndexSettings(index_dir=tmp_path / "idx", chunk_tokens=64)
    first = refresh_index([wiki], settings, HashingEmbedder(16))
    before = snapshot(settings.index_dir)
    monkeypatch.setattr(pipeline, "iter_root", _failing_walk(pipeline.iter_root))
    # A new seed: every chunk would be re-embedded, so a partial write would show.
    with pytest.raises(RuntimeError, match="parser bug"):
        refresh_index([wiki], settings, HashingEmbedder(16, seed=1), rebuild=True)
    assert not [t for t in threading.enumerate() if t.name == "sounding-walk"]
    assert snapshot(settings.index_dir) == before
    reader = IndexReader(settings.index_dir)
    assert reader.generation == first.generation
    reader.close()
    # The lock was let go: the next run goes ahead.
    monkeypatch.undo()
    assert refresh_index([wiki], settings, HashingEmbedder(16)).unchanged == first.documents


def test_failure_in_the_encoder_stops_the_producer(tmp_path: Path) -> None:
    class Broken(HashingEmbedder):
        def encode(self, texts):  # type: ignore[no-untyped-def]
            raise ValueError("encoder died")

    settings = IndexSettings(index_dir=tmp_path / "idx", chunk_tokens=64)
    with pytest.raises(ValueError, match="encoder died"):
        refresh_index([small_wiki(tmp_path / "wiki", 600)], settings, Broken(16))
    assert not [t for t in threading.enumerate() if t.name == "sounding-walk"]


def test_threaded_is_bounded_and_ordered() -> None:
    produced: list[int] = []

    def steps() -> Iterator[int]:
        for i in range(50):
            produced.append(i)
            yield i

    stream = pipeline.threaded(steps(), depth=4)  # type: ignore[arg-type]
    assert next(stream) == 0
    threading.Event().wait(0.2)
    assert len(produced) <= 4 + 2  # the queue, one item in hand, one being put
    assert list(stream) == list(range(1, 50))


@pytest.mark.slow
def test_chunking_tokenizer_matches_the_models() -> None:
    """tokenizer.json read directly cuts where the Hugging Face tokenizer cuts."""
    from sounding.indexer.loaders import iter_root
    from transformers import AutoTokenizer

    embedder = SentenceTransformerEmbedder(precision="fp32")
    hf = AutoTokenizer.from_pretrained(str(embedder.path))
    texts = [d.text for d in iter_root(DEMO) if hasattr(d, "text")]
    texts += ["", "  ", "naïve café — ünïcode ☃ 😀 emoji", "x" * 5000, "word " * 3000]
    assert len(texts) > 50
    for text in texts:
        out = hf(text, add_special_tokens=False, return_offsets_mapping=True, verbose=False)
        assert embedder.tokenizer.spans(text) == [tuple(s) for s in out["offset_mapping"]]
    assert embedder._model is None  # chunking loaded neither torch's model nor the weights


def test_unchanged_run_asks_for_no_tokenizer(tmp_path: Path) -> None:
    """Nothing to chunk, no tokenizer: for the real encoder that is tokenizers' import (or,
    without tokenizer.json, torch and the weights)."""

    class NoTokenizer(HashingEmbedder):
        @property  # type: ignore[override]
        def tokenizer(self):  # type: ignore[no-untyped-def]
            raise AssertionError("an unchanged run asked for the tokenizer")

        @tokenizer.setter
        def tokenizer(self, value) -> None:  # type: ignore[no-untyped-def]
            pass

    wiki = small_wiki(tmp_path / "wiki", 5)
    settings = IndexSettings(index_dir=tmp_path / "idx", chunk_tokens=64)
    refresh_index([wiki], settings, HashingEmbedder(16))
    assert refresh_index([wiki], settings, NoTokenizer(16)).unchanged == 5
