"""Build or refresh an index from folders of documents (``sounding index``)."""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .access import AccessRules, may_read, parse_tags
from .chunking import Chunk, chunk_document
from .documents import Document, Skipped
from .embedding import Embedder, describe
from .errors import IndexLockedError, LoadError, SettingsError, SoundingError
from .loaders import iter_root
from .lock import IndexLock
from .reports import PushReport, RefreshReport

__all__ = ["PushReport", "RefreshReport", "delete_document", "push_document", "refresh_index"]
from .settings import IndexSettings
from .store import SCHEMA_VERSION, IndexWriter, Manifest, write_last_run
from .vectors import plan_is_current
from .write_access import check_visible, check_writable

# Documents are embedded and stored in groups of about this many chunks: big
# enough for full encoder batches, small enough to bound memory; a group's end
# is a checkpoint where --max-runtime may stop the run.
_GROUP_CHUNKS = 512


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


def too_many_chunks(chunks: list[Chunk], settings: IndexSettings) -> str | None:
    """Why ``chunks`` are too many to embed for one document, or None."""
    if len(chunks) <= settings.max_document_chunks:
        return None
    return (
        f"cut into {len(chunks)} chunks, over the limit of {settings.max_document_chunks} "
        "(setting max_document_chunks)"
    )


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
            raise SettingsError(f"the folder to index does not exist: {root}")
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
            for item in iter_root(
                root, max_file_bytes=settings.max_file_bytes, limits=settings.load_limits
            ):
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
                report.warn(item)
                if known.get(item.id) == (coll, item.content_hash):
                    if labels.get(item.id) == (groups, tags):
                        report.unchanged += 1
                    else:
                        # Same text, new access rules or tags: no re-embedding needed.
                        writer.relabel(item.id, groups, tags)
                        report.updated.append(item.id)
                    continue
                chunks = chunk_document(item, embedder.tokenizer, chunking)
                problem = "no text" if not chunks else too_many_chunks(chunks, settings)
                if problem:
                    # Not indexable now: a version stored before is removed with the gone.
                    report.skipped.append(Skipped(item.id, problem))
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
        previous = writer.previous
        changed = rebuild or report.added or report.updated or gone
        if previous is not None and not changed and _current(previous, settings, writer):
            # A new generation would only make every service reload the same index.
            manifest, report.published = previous, False
        else:
            manifest = writer.publish()
    report.generation = manifest.generation
    report.documents = manifest.documents
    report.chunks = manifest.chunks
    report.seconds = time.monotonic() - started
    return report


def _current(previous: Manifest, settings: IndexSettings, writer: IndexWriter) -> bool:
    """Whether the last generation needs nothing when no document changed: a schema upgrade,
    a lost vector file or a new vector index setting is published all the same."""
    return (
        previous.schema_version == SCHEMA_VERSION
        and (settings.index_dir / previous.vectors_file).is_file()
        and plan_is_current(
            previous.vectors, previous.chunks, writer.dimension, settings.vector_choice
        )
    )


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
    caller_groups: frozenset[str] | None = None,
) -> PushReport:
    """Index one document that arrived outside a folder run, and publish at once.

    The same pipeline as a folder run (chunking, reuse of unchanged chunks'
    vectors, one transaction, a new generation). ``groups`` / ``tags`` given
    here win over the document's own; otherwise the access rules apply as
    for a file. Waits up to ``wait_seconds`` for a running re-index, then
    raises IndexLockedError. Raises LoadError when the document has no text
    or invalid groups.

    ``caller_groups``: the pusher's groups (None: unrestricted, the CLI); see
    :mod:`.write_access` for the AccessError and HiddenDocumentError it raises.
    """
    chunking = settings.chunking
    chunking.check(embedder.max_tokens)
    rules = AccessRules.load(settings.access_rules)
    own_groups, own_tags = labels_of(doc, collection, rules)
    groups = own_groups if groups is None else groups
    tags = own_tags if tags is None else tags
    check_writable(groups, caller_groups)
    chunks = chunk_document(doc, embedder.tokenizer, chunking)
    if not chunks:
        raise LoadError("no text")
    if problem := too_many_chunks(chunks, settings):
        raise LoadError(problem)
    with (
        _locked(settings.index_dir, wait_seconds),
        IndexWriter(settings.index_dir, describe(embedder), chunking) as writer,
    ):
        stored = writer.labels().get(doc.id)
        # Before any other answer about the id (its collection, say): a hidden one stays hidden.
        check_visible(doc.id, None if stored is None else stored[0], caller_groups)
        known = writer.known().get(doc.id)
        if known is not None and known[0] != collection:
            raise SettingsError(
                f"document {doc.id!r} belongs to collection {known[0]!r}, not {collection!r}; "
                "push it to its own collection or delete it first"
            )
        if known == (collection, doc.content_hash):
            if stored == (groups, tags):
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
    settings: IndexSettings,
    embedder: Embedder,
    document_id: str,
    *,
    wait_seconds: float = 10.0,
    caller_groups: frozenset[str] | None = None,
) -> PushReport | None:
    """Remove one document and publish at once; None when it is not in the index, or
    is hidden from ``caller_groups`` (decided under the index lock; None: unrestricted)."""
    with (
        _locked(settings.index_dir, wait_seconds),
        IndexWriter(settings.index_dir, describe(embedder), settings.chunking) as writer,
    ):
        stored = writer.labels().get(document_id)
        if stored is None or not may_read(stored[0], caller_groups):
            return None
        if not writer.remove([document_id]):
            return None
        manifest = writer.publish()
    return PushReport(document_id, "removed", generation=manifest.generation)
