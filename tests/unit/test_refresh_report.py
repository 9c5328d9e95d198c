"""What ``sounding index`` reports and publishes: no-op runs, the plain listing, eval progress."""

from __future__ import annotations

from pathlib import Path

from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.experiment import evaluate_collection
from sounding.indexer.reports import RefreshReport
from sounding.indexer.settings import IndexSettings
from sounding.indexer.store import Manifest, read_last_run

from tests.unit.test_evaluation import tiny_collection


def wiki(root: Path) -> Path:
    root.mkdir(parents=True, exist_ok=True)
    (root / "a.md").write_text("# Alpha\n\nIntake screens are cleaned weekly.\n")
    (root / "b.txt").write_text("Beta notes\n\nThe beta pump hums at night.\n")
    return root


def settings_for(tmp_path: Path, **kw) -> IndexSettings:
    return IndexSettings(index_dir=tmp_path / "idx", chunk_tokens=64, chunk_overlap=8, **kw)


def test_an_unchanged_run_publishes_nothing(tmp_path: Path) -> None:
    root, settings, emb = wiki(tmp_path / "wiki"), settings_for(tmp_path), HashingEmbedder(16)
    first = refresh_index([root], settings, emb)
    manifest = (settings.index_dir / "manifest.json").stat().st_mtime_ns
    again = refresh_index([root], settings, emb)
    assert again.generation == first.generation == 1 and not again.published
    assert (again.documents, again.chunks) == (first.documents, first.chunks)
    assert (settings.index_dir / "manifest.json").stat().st_mtime_ns == manifest
    assert "generation 1 kept: nothing changed" in again.summary()
    assert again.to_json()["published"] is False
    # The last-run record is still written for monitoring.
    assert "kept: nothing changed" in (read_last_run(settings.index_dir) or {})["detail"]
    (root / "a.md").write_text("# Alpha\n\nIntake screens are cleaned daily.\n")
    changed = refresh_index([root], settings, emb)
    assert changed.published and changed.generation == 2 and changed.updated == ["a.md"]


def test_a_removal_or_a_new_vector_setting_still_publishes(tmp_path: Path) -> None:
    root, settings, emb = wiki(tmp_path / "wiki"), settings_for(tmp_path), HashingEmbedder(16)
    refresh_index([root], settings, emb)
    (root / "b.txt").unlink()
    assert refresh_index([root], settings, emb).generation == 2
    forced = settings_for(tmp_path, vector_index="ivf")
    assert refresh_index([root], forced, emb).published  # exact -> ivf is rebuilt
    assert not refresh_index([root], forced, emb).published
    lost = settings.index_dir / Manifest.read(settings.index_dir).vectors_file
    lost.unlink()
    healed = refresh_index([root], forced, emb)
    assert healed.published and (settings.index_dir / healed_file(settings)).is_file()


def healed_file(settings: IndexSettings) -> str:
    return Manifest.read(settings.index_dir).vectors_file


def test_the_plain_report_lists_each_document_capped() -> None:
    report = RefreshReport(
        added=[f"new-{i}.md" for i in range(5)], updated=["u.md"], removed=["gone.md"]
    )
    lines = report.text(limit=3).splitlines()
    assert lines[0].startswith("added 5, updated 1, removed 1")
    assert lines[1:] == [
        "added new-0.md", "added new-1.md", "added new-2.md",
        "... and 2 more added (--json lists all)", "updated u.md", "removed gone.md",
    ]  # fmt: skip


def test_eval_reports_indexing_then_queries(tmp_path: Path) -> None:
    data = tiny_collection(tmp_path / "tiny")
    seen: list[tuple[str, int, int]] = []
    evaluate_collection(
        data, "dense", settings_for(tmp_path), HashingEmbedder(16),
        progress=lambda stage, done, total: seen.append((stage, done, total)),
    )  # fmt: skip
    stages = [s for s, _, _ in seen]
    assert stages.index("queries") > max(i for i, s in enumerate(stages) if s == "indexing")
    assert seen[-1] == ("queries", 4, 4)
    assert ("indexing", 0, 4) in seen
