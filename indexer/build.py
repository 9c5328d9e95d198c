"""Build or refresh an index from folders of documents (``sounding index``)."""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .access import AccessRules, parse_tags
from .chunking import Chunk, chunk_document
from .documents import Document, Skipped
from .embedding import Embedder, describe
from .errors import IndexLockedError, LoadError, SettingsError, SoundingError
from .loaders import iter_root
from .lock import IndexLock
from .settings import IndexSettings
from .store import IndexWriter, write_last_run

# Documents are embedded and stored in groups of about this many chunks: big
# enough for full encoder batches, small enough to bound memory; a group's end
# is a checkpoint where --max-runtime may stop the run.
_GROUP_CHUNKS = 512


@dataclass
class RefreshReport:
    """What one ``sounding index`` run did."""

    added: list[str] = field(default_factory=list)
    updated: list[str] = field(default_factory=list)
    removed: list[str] = field(default_factory=list)
    unchanged: int = 0
    skipped: list[Skipped] = field(default_factory=list)
    chunks_embedded: int = 0
    chunks_reused: int = 0
    generation: int = 0
    documents: int = 0
    chunks: int = 0
    seconds: float = 0.0
    stopped_early: bool = False  # max_runtime reached; the rest waits for the next run
    pending_left: int = 0
    lock_taken_over: bool = False  # the previous run died holding the lock

    def summary(self) -> str:
        """One line of counts."""
        tail = ""
        if self.stopped_early:
            tail = (
                f"; stopped at the time limit with {self.pending_left} documents left "
                "for the next run"
            )
        return (
            f"added {len(self.added)}, updated {len(self.updated)}, removed {len(self.removed)}, "
            f"unchanged {self.unchanged}, skipped {len(self.skipped)}; "
            f"index now holds {self.documents} documents in {self.chunks} chunks "
            f"(generation {self.generation}, {self.chunks_embedded} chunks embedded, "
            f"{self.chunks_reused} reused, {self.seconds:.1f} s){tail}"
        )

    def to_json(self) -> dict[str, object]:
        return {
            "added": self.added,
            "updated": self.updated,
            "removed": self.removed,
            "unchanged": self.unchanged,
            "skipped": [{"path": s.path, "reason": s.reason} for s in self.skipped],
            "chunks_embedded": self.chunks_embedded,
            "chunks_reused": self.chunks_reused,
            "generation": self.generation,
            "documents": self.documents,
            "chunks": self.chunks,
            "seconds": round(self.seconds, 3),
            "stopped_early": self.stopped_early,
            "pending_left": self.pending_left,
            "lock_taken_over": self.lock_taken_over,
        }


def collection_name(root: Path) -> str:
    """Default collection of a root: its folder name (a file's: its parent's)."""
    resolved = root.resolve()
    if resolved.is_file():
        resolved = resolved.parent
    return resolved.name or "default"


@dataclass
class _Pending:
    doc: Document
    collection: str
    chunks: list[Chunk]
    is_new: bool
    groups: tuple[str, ...] = ()
    tags: tuple[str, ...] = ()


def labels_of(
    doc: Document, collection: str, rules: AccessRules
) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """(groups that may read ``doc``, its tags); LoadError when its groups are invalid."""
    return rules.groups_for(collection, doc.id, doc.metadata), parse_tags(doc.metadata.get("tags"))


def refresh_index(
    roots: Sequence[Path],
    settings: IndexSettings,
    embedder: Embedder,
    *,
    rebuild: bool = False,
    collection: str | None = None,
    progress: Callable[[int, int], None] | None = None,
    max_runtime: float | None = None,
) -> RefreshReport:
    """Bring the index at ``settings.index_dir`` in step with ``roots``.

    A document whose content hash is unchanged is left alone; a changed one
    is re-chunked, and only chunks whose text changed are re-embedded; a
    document that is gone from its root is removed. Documents of roots not
    named in this run are kept. ``progress(done, total)`` is called as chunks
    are embedded.

    Only one run at a time may change an index: a second one raises
    IndexLockedError at once. With ``max_runtime`` (seconds) the run stops at
    the first checkpoint past the limit and publishes what it finished; the
    next run carries on where it stopped.

    The outcome (ok, or failed with the reason) is recorded in the index
    folder for monitoring; a run refused because another holds the lock
    changes nothing and records nothing.
    """
    try:
        report = _refresh(
            roots,
            settings,
            embedder,
            rebuild=rebuild,
            collection=collection,
            progress=progress,
            max_runtime=max_runtime,
        )
    except IndexLockedError:
        raise
    except SoundingError as exc:
        if settings.index_dir.is_dir():
            write_last_run(settings.index_dir, "failed", str(exc))
        raise
    write_last_run(
        settings.index_dir,
        "ok",
        report.summary(),
        generation=report.generation,
        seconds=round(report.seconds, 3),
    )
    return report


def _refresh(
    roots: Sequence[Path],
    settings: IndexSettings,
    embedder: Embedder,
    *,
    rebuild: bool,
    collection: str | None,
    progress: Callable[[int, int], None] | None,
    max_runtime: float | None,
) -> RefreshReport:
    started = time.monotonic()
    if not roots:
        raise SettingsError("no path to index; name one or more folders or files")
    for root in roots:
        if not root.exists():
            raise SettingsError(f"path to index does not exist: {root}")
    chunking = settings.chunking
    chunking.check(embedder.max_tokens)
    report = RefreshReport()
    rules = AccessRules.load(settings.access_rules)
    deadline = None if max_runtime is None else started + max_runtime
    with (
        IndexLock(settings.index_dir) as lock,
        IndexWriter(
            settings.index_dir,
            describe(embedder),
            chunking,
            rebuild=rebuild,
            vectors=settings.vector_choice,
        ) as writer,
    ):
        report.lock_taken_over = lock.took_over is not None
        known = writer.known()
        labels = writer.labels()
        seen: dict[str, str] = {}
        pending: list[_Pending] = []
        for root in roots:
            coll = collection or collection_name(root)
            for item in iter_root(root, max_file_bytes=settings.max_file_bytes):
                if isinstance(item, Skipped):
                    report.skipped.append(item)
                    continue
                if item.id in seen:
                    report.skipped.append(
                        Skipped(item.id, f"duplicate document id, already taken in {seen[item.id]}")
                    )
                    continue
                try:
                    groups, tags = labels_of(item, coll, rules)
                except LoadError as exc:
                    report.skipped.append(Skipped(item.id, str(exc)))
                    continue
                seen[item.id] = str(root)
                if known.get(item.id) == (coll, item.content_hash):
                    if labels.get(item.id) == (groups, tags):
                        report.unchanged += 1
                    else:
                        # Same text, new access rules or tags: no re-embedding needed.
                        writer.relabel(item.id, groups, tags)
                        report.updated.append(item.id)
                    continue
                chunks = chunk_document(item, embedder.tokenizer, chunking)
                if not chunks:
                    report.skipped.append(Skipped(item.id, "no text"))
                    seen.pop(item.id)
                    continue
                pending.append(_Pending(item, coll, chunks, item.id not in known, groups, tags))

        total = sum(len(p.chunks) for p in pending)
        done = 0
        if progress:
            progress(0, total)
        group: list[_Pending] = []
        for i, p in enumerate(pending):
            if deadline is not None and time.monotonic() > deadline and not group and done:
                # Checkpoint: every stored document is complete; publish and stop.
                # (At least one group per run, so even a tiny limit makes progress.)
                report.stopped_early = True
                report.pending_left = len(pending) - i
                break
            group.append(p)
            if sum(len(g.chunks) for g in group) >= _GROUP_CHUNKS or i == len(pending) - 1:
                done += _embed_and_store(writer, embedder, group, report)
                if progress:
                    progress(done, total)
                group = []

        collections = {collection or collection_name(r) for r in roots}
        gone = [i for i, (coll, _) in known.items() if coll in collections and i not in seen]
        writer.remove(gone)
        report.removed = sorted(gone)
        manifest = writer.publish()
    report.generation = manifest.generation
    report.documents = manifest.documents
    report.chunks = manifest.chunks
    report.seconds = time.monotonic() - started
    return report


def _embed_and_store(
    writer: IndexWriter, embedder: Embedder, group: list[_Pending], report: RefreshReport
) -> int:
    """Embed the chunks of ``group`` that have no stored vector, then store each document."""
    reuse: list[dict[str, np.ndarray]] = [
        {} if p.is_new else writer.stored_vectors(p.doc.id) for p in group
    ]
    texts: list[str] = []
    for p, old in zip(group, reuse, strict=True):
        texts += [c.embed_text for c in p.chunks if c.embed_hash not in old]
    fresh = iter(embedder.encode(texts)) if texts else iter(())
    for p, old in zip(group, reuse, strict=True):
        vectors = np.empty((len(p.chunks), embedder.dimension), dtype=np.float32)
        for j, c in enumerate(p.chunks):
            if c.embed_hash in old:
                vectors[j] = old[c.embed_hash]
                report.chunks_reused += 1
            else:
                vectors[j] = next(fresh)
                report.chunks_embedded += 1
        writer.put(p.doc, p.collection, p.chunks, vectors, groups=p.groups, tags=p.tags)
        (report.added if p.is_new else report.updated).append(p.doc.id)
    return sum(len(p.chunks) for p in group)


@dataclass
class PushReport:
    """What one pushed change did."""

    document_id: str
    action: str  # "added", "updated", "unchanged" or "removed"
    chunks: int = 0
    chunks_embedded: int = 0
    generation: int = 0


def _locked(index_dir: Path, wait_seconds: float) -> IndexLock:
    """The index lock, waiting up to ``wait_seconds`` for a running re-index to finish."""
    deadline = time.monotonic() + wait_seconds
    while True:
        try:
            return IndexLock(index_dir).acquire()
        except IndexLockedError:
            if time.monotonic() >= deadline:
                raise
            time.sleep(0.05)


def push_document(
    settings: IndexSettings,
    embedder: Embedder,
    doc: Document,
    collection: str,
    *,
    groups: tuple[str, ...] | None = None,
    tags: tuple[str, ...] | None = None,
    wait_seconds: float = 10.0,
) -> PushReport:
    """Index one document that arrived outside a folder run, and publish at once.

    The same pipeline as a folder run (chunking, reuse of unchanged chunks'
    vectors, one transaction, a new generation). ``groups`` / ``tags`` given
    here win over the document's own; otherwise the access rules apply as
    for a file. Waits up to ``wait_seconds`` for a running re-index, then
    raises IndexLockedError. Raises LoadError when the document has no text
    or invalid groups.
    """
    chunking = settings.chunking
    chunking.check(embedder.max_tokens)
    rules = AccessRules.load(settings.access_rules)
    own_groups, own_tags = labels_of(doc, collection, rules)
    groups = own_groups if groups is None else groups
    tags = own_tags if tags is None else tags
    chunks = chunk_document(doc, embedder.tokenizer, chunking)
    if not chunks:
        raise LoadError("no text")
    with (
        _locked(settings.index_dir, wait_seconds),
        IndexWriter(settings.index_dir, describe(embedder), chunking) as writer,
    ):
        known = writer.known().get(doc.id)
        if known is not None and known[0] != collection:
            raise SettingsError(
                f"document {doc.id!r} belongs to collection {known[0]!r}, not {collection!r}; "
                "push it to its own collection or delete it first"
            )
        if known == (collection, doc.content_hash):
            if writer.labels().get(doc.id) == (groups, tags):
                manifest = writer.previous
                return PushReport(
                    doc.id, "unchanged", len(chunks), 0, manifest.generation if manifest else 0
                )
            writer.relabel(doc.id, groups, tags)
            manifest = writer.publish()
            return PushReport(doc.id, "updated", len(chunks), 0, manifest.generation)
        report = RefreshReport()
        pending = _Pending(doc, collection, chunks, known is None, groups, tags)
        _embed_and_store(writer, embedder, [pending], report)
        manifest = writer.publish()
    # No last-run record: it reports folder runs, and a push must not hide a failed one.
    return PushReport(
        doc.id,
        "added" if known is None else "updated",
        len(chunks),
        report.chunks_embedded,
        manifest.generation,
    )


def delete_document(
    settings: IndexSettings, embedder: Embedder, document_id: str, *, wait_seconds: float = 10.0
) -> PushReport | None:
    """Remove one document and publish at once; None when it is not in the index."""
    with (
        _locked(settings.index_dir, wait_seconds),
        IndexWriter(settings.index_dir, describe(embedder), settings.chunking) as writer,
    ):
        if not writer.remove([document_id]):
            return None
        manifest = writer.publish()
    return PushReport(document_id, "removed", generation=manifest.generation)
