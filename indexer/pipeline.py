"""The body of a folder run: walk and chunk, embed and store, overlapped.

:func:`walk` loads and chunks the documents of the roots and yields what the
run must do with each (skip it, count it unchanged, relabel it, embed it);
:func:`run_pipeline` consumes those steps, embedding and storing documents in
groups of about ``GROUP_CHUNKS`` chunks. With ``threaded`` the walk runs in a
producer thread that feeds a bounded queue, so loading, parsing and chunking
the next documents overlap with encoding the current group (torch releases
the GIL while it computes); every SQLite write stays on the caller's thread,
the writer's connection and its one transaction. The outcome is the same as
the sequential path's: same index, same report, in the same order.
"""

from __future__ import annotations

import queue
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .access import AccessRules, parse_tags
from .chunking import Chunk, ChunkSettings, Tokenizer, chunk_document
from .documents import Document, Skipped
from .embedding import Embedder
from .errors import LoadError
from .loaders import iter_root
from .reports import RefreshReport
from .settings import IndexSettings
from .store import IndexWriter

# Documents are embedded and stored in groups of about this many chunks: big
# enough for full encoder batches, small enough to bound memory; a group's end
# is a checkpoint where --max-runtime may stop the run.
GROUP_CHUNKS = 512
# Steps the walk may run ahead of the encoder: bounds memory (a step holds one
# document's text and chunks) while keeping a group or more ready.
QUEUE_STEPS = 256


@dataclass
class Pending:
    """A document to embed (its chunks whose text changed) and store."""

    doc: Document
    collection: str
    chunks: list[Chunk]
    is_new: bool
    groups: tuple[str, ...] = ()
    tags: tuple[str, ...] = ()


@dataclass
class Relabel:
    """Same text, new access groups or tags: stored again without re-embedding."""

    doc_id: str
    groups: tuple[str, ...]
    tags: tuple[str, ...]


@dataclass
class WalkState:
    """What the walk learnt: ids seen per root (for the gone ones); filled by the walk."""

    seen: dict[str, str] = field(default_factory=dict)


def collection_name(root: Path) -> str:
    """Default collection of a root: its folder name (a file's: its parent's)."""
    resolved = root.resolve()
    if resolved.is_file():
        resolved = resolved.parent
    return resolved.name or "default"


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


Step = Pending | Relabel | None  # None: one more document found unchanged


def walk(
    roots: Sequence[Path],
    settings: IndexSettings,
    collection: str | None,
    rules: AccessRules,
    known: dict[str, tuple[str, str]],
    labels: dict[str, tuple[tuple[str, ...], tuple[str, ...]]],
    tokenizer: Callable[[], Tokenizer],
    chunking: ChunkSettings,
    report: RefreshReport,
    state: WalkState,
) -> Iterator[Step]:
    """Load and chunk the documents of ``roots``; yield the step each needs.

    Touches no database: it reads ``known`` and ``labels`` and records skipped
    files and warnings in ``report`` (whose other fields only the consumer sets).
    ``tokenizer()`` is asked for only when a document must be chunked: a run
    that finds nothing changed loads no tokenizer (nor, for a model folder
    without tokenizer.json, the model).
    """
    for root in roots:
        coll = collection or collection_name(root)
        for item in iter_root(
            root, max_file_bytes=settings.max_file_bytes, limits=settings.load_limits
        ):
            if isinstance(item, Skipped):
                report.skipped.append(item)
                continue
            if item.id in state.seen:
                report.skipped.append(
                    Skipped(
                        item.id, f"duplicate document id, already taken in {state.seen[item.id]}"
                    )
                )
                continue
            try:
                groups, tags = labels_of(item, coll, rules)
            except LoadError as exc:
                report.skipped.append(Skipped(item.id, str(exc)))
                continue
            state.seen[item.id] = str(root)
            report.warn(item)
            if known.get(item.id) == (coll, item.content_hash):
                yield (
                    None
                    if labels.get(item.id) == (groups, tags)
                    else Relabel(item.id, groups, tags)
                )
                continue
            chunks = chunk_document(item, tokenizer(), chunking)
            problem = "no text" if not chunks else too_many_chunks(chunks, settings)
            if problem:
                # Not indexable now: a version stored before is removed with the gone.
                report.skipped.append(Skipped(item.id, problem))
                state.seen.pop(item.id)
                continue
            yield Pending(item, coll, chunks, item.id not in known, groups, tags)


_END = object()


def threaded(steps: Iterator[Step], depth: int = QUEUE_STEPS) -> Iterator[Step]:
    """``steps``, produced by a background thread through a bounded queue.

    An exception in the producer is raised here, in the consumer, at the point
    of the stream where it happened. When the consumer stops early (an error
    of its own, or it is closed), the producer is told to stop and joined
    before this generator returns, so no thread outlives the run's lock.
    """
    channel: queue.Queue[object] = queue.Queue(maxsize=depth)
    stop = threading.Event()

    def put(item: object) -> bool:
        while not stop.is_set():
            try:
                channel.put(item, timeout=0.1)
                return True
            except queue.Full:
                continue
        return False

    def produce() -> None:
        try:
            for step in steps:
                if not put(step):
                    return
            put(_END)
        except BaseException as exc:  # handed to the consumer, which raises it
            put(exc)

    worker = threading.Thread(target=produce, name="sounding-walk", daemon=True)
    worker.start()
    try:
        while True:
            item = channel.get()
            if item is _END:
                return
            if isinstance(item, BaseException):
                raise item
            yield item  # type: ignore[misc]
    finally:
        stop.set()
        worker.join()


def run_pipeline(
    steps: Iterator[Step],
    writer: IndexWriter,
    embedder: Embedder,
    report: RefreshReport,
    *,
    deadline: float | None,
    progress: Callable[[int, int], None] | None,
    on_first_pending: Callable[[], None] | None = None,
) -> None:
    """Apply the walk's ``steps``: relabel, embed and store in groups, stop at ``deadline``.

    ``progress(done, total)``: ``total`` counts the chunks found so far, and
    stays one above ``done`` until the walk has ended, so a bar does not close
    early. ``on_first_pending`` is called once, as soon as something must be
    embedded (to start loading the encoder while the walk goes on).
    """
    relabeled: list[str] = []
    group: list[Pending] = []
    group_chunks = done = total = 0
    stopped = False
    if progress:
        progress(0, 1)
    for step in steps:
        if step is None:
            report.unchanged += 1
            continue
        if isinstance(step, Relabel):
            writer.relabel(step.doc_id, step.groups, step.tags)
            relabeled.append(step.doc_id)
            continue
        if stopped:
            report.pending_left += 1
            continue
        if on_first_pending is not None and not total:
            on_first_pending()
        total += len(step.chunks)
        if deadline is not None and time.monotonic() > deadline and not group and done:
            # Checkpoint: every stored document is complete; publish what is done and
            # stop embedding (the walk still ends, so the gone are known).
            # (At least one group per run, so even a tiny limit makes progress.)
            report.stopped_early, stopped = True, True
            report.pending_left += 1
            continue
        group.append(step)
        group_chunks += len(step.chunks)
        if group_chunks >= GROUP_CHUNKS:
            done += embed_and_store(writer, embedder, group, report)
            group, group_chunks = [], 0
            if progress:
                progress(done, total + 1)
    if progress:
        progress(done, total)  # the walk has ended: the total is known
    if group:
        done += embed_and_store(writer, embedder, group, report)
    if progress:
        progress(done, done)
    # Relabeled documents first, as when the walk ended before any embedding.
    report.updated[:0] = relabeled


def embed_and_store(
    writer: IndexWriter, embedder: Embedder, group: list[Pending], report: RefreshReport
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
