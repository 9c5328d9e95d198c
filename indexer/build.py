"""Build or refresh an index from folders of documents (``sounding index``)."""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from pathlib import Path

from .access import AccessRules, may_read
from .chunking import chunk_document
from .documents import Document
from .embedding import Embedder, describe
from .errors import IndexLockedError, LoadError, SettingsError, SoundingError
from .lock import IndexLock
from .pipeline import (
    GROUP_CHUNKS,
    Pending,
    WalkState,
    collection_name,
    embed_and_store,
    labels_of,
    run_pipeline,
    threaded,
    too_many_chunks,
    walk,
)
from .reports import PushReport, RefreshReport

__all__ = [
    "PushReport",
    "RefreshReport",
    "collection_name",
    "delete_document",
    "labels_of",
    "push_document",
    "refresh_index",
    "too_many_chunks",
]
from .settings import IndexSettings
from .store import SCHEMA_VERSION, IndexWriter, Manifest, write_last_run
from .vectors import plan_is_current
from .write_access import check_visible, check_writable

# Re-exported: tests/bench/encode.py hands the encoder groups of this size.
_GROUP_CHUNKS = GROUP_CHUNKS


def refresh_index(
    roots: Sequence[Path],
    settings: IndexSettings,
    embedder: Embedder,
    *,
    rebuild: bool = False,
    collection: str | None = None,
    progress: Callable[[int, int], None] | None = None,
    max_runtime: float | None = None,
    pipelined: bool = True,
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

    ``pipelined`` (the default) loads and chunks documents in a producer
    thread while this one embeds and stores (:mod:`.pipeline`); False walks
    in this thread, the same run step by step (tests compare the two).
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
            pipelined=pipelined,
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
    pipelined: bool,
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
        known, state = writer.known(), WalkState()
        steps = walk(
            roots,
            settings,
            collection,
            rules,
            known,
            writer.labels(),
            lambda: embedder.tokenizer,
            chunking,
            report,
            state,
        )
        # Start loading the encoder (torch, weights: seconds) as soon as something must be
        # embedded, while the walk goes on; only the real encoder has a preload.
        preload = getattr(embedder, "preload", None)
        run_pipeline(
            threaded(steps) if pipelined else steps,
            writer,
            embedder,
            report,
            deadline=deadline,
            progress=progress,
            on_first_pending=preload if callable(preload) else None,
        )
        seen = state.seen
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
        pending = Pending(doc, collection, chunks, known is None, groups, tags)
        embed_and_store(writer, embedder, [pending], report)
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
