"""The service's loaded resources: one encoder, and the index generation being served.

A :class:`Generation` is one committed index generation opened for reading (its
reader and a searcher over it). Each request holds the generation it started
with (:meth:`Engine.hold`) and lets go when it is done; the engine holds the
current one too. When a newer generation is loaded the engine lets go of the
old one, which closes as soon as its last request lets go, so requests in
flight finish on the generation they began with and its SQLite snapshot ends
right after (a snapshot held open keeps WAL checkpoints from passing it).
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable
from pathlib import Path

from sounding.indexer.embedding import Embedder
from sounding.indexer.errors import SoundingError
from sounding.indexer.search import Searcher
from sounding.indexer.store import MANIFEST, IndexReader

log = logging.getLogger("sounding.service")

# SQLite read connections per generation, each on the same snapshot: requests of one
# generation read in parallel up to this many at a time (more wait for a free one).
READ_CONNECTIONS = 4


class Generation:
    """One index generation opened for serving, shared by the requests that hold it.

    Created held once (by the engine that loads it); :meth:`hold` and
    :meth:`release` count further holders, and the reader closes when the count
    reaches zero. A closed generation cannot be held again.
    """

    def __init__(self, searcher: Searcher) -> None:
        self.searcher = searcher
        self.reader: IndexReader = searcher.reader
        self._holders = 1
        self._lock = threading.Lock()

    @property
    def number(self) -> int:
        """The index generation this serves."""
        return self.reader.generation

    @property
    def closed(self) -> bool:
        return self._holders == 0

    def hold(self) -> bool:
        """Count one more holder; False (and no hold) if it has closed already."""
        with self._lock:
            if self._holders == 0:
                return False
            self._holders += 1
            return True

    def release(self) -> None:
        """Let go of one hold; the last one closes the reader."""
        with self._lock:
            if self._holders == 0:
                raise RuntimeError(f"generation {self.number} released more often than held")
            self._holders -= 1
            last = self._holders == 0
        if last:
            self.reader.close()
            log.debug("index generation %s closed", self.number)


class Engine:
    """Serves the newest complete index generation, loading each new one as it appears.

    The indexer publishes a generation by replacing ``manifest.json``
    atomically; the engine notices the change (checking at most every
    ``check_seconds``) and swaps in a :class:`Generation` of it.
    """

    def __init__(
        self,
        index_dir: Path,
        embedder: Embedder,
        make_searcher: Callable[[IndexReader], Searcher],
        check_seconds: float = 2.0,
        read_connections: int = READ_CONNECTIONS,
    ) -> None:
        self.index_dir = Path(index_dir)
        self.embedder = embedder
        self.make_searcher = make_searcher
        self.check_seconds = check_seconds
        self.read_connections = read_connections
        self._current: Generation | None = None
        self._stamp: tuple[int, int] | None = None
        self._checked = 0.0
        self._lock = threading.Lock()  # loading and swapping only; reads never take it
        self.error: str | None = None
        self._in_flight = 0  # requests under way (deps.held_generation_or_none counts them)
        self._count_lock = threading.Lock()
        self._load()

    @property
    def in_flight(self) -> int:
        """Requests holding a generation right now: the query batcher's hint of more to come."""
        return self._in_flight

    def count_request(self, delta: int) -> None:
        """One request more (+1) or fewer (-1) under way."""
        with self._count_lock:
            self._in_flight += delta

    def _manifest_stamp(self) -> tuple[int, int] | None:
        try:
            st = (self.index_dir / MANIFEST).stat()
        except OSError:
            return None
        return (st.st_mtime_ns, st.st_ino)

    def _open(self) -> Generation:
        # A pinned reader sees one committed generation for as long as it is open.
        reader = IndexReader(self.index_dir, pinned=True, connections=self.read_connections)
        try:
            return Generation(self.make_searcher(reader))
        except BaseException:
            reader.close()
            raise

    def _load(self) -> None:
        stamp = self._manifest_stamp()
        try:
            generation = self._open()
        except SoundingError as exc:
            # Keep serving the generation we have; report why the new one is not used.
            self.error = str(exc)
            if self._current is None:
                log.warning("no index loaded: %s", exc)
            else:
                log.error("keeping generation %s: %s", self._current.number, exc)
            self._stamp = stamp
            return
        old = self._current
        self._current, self._stamp, self.error = generation, stamp, None
        docs, chunks = generation.reader.counts()
        log.info(
            "index generation %s loaded: %s documents, %s chunks", generation.number, docs, chunks
        )
        if old is not None:
            old.release()  # closes once the requests still holding it are done

    def refresh_due(self) -> bool:
        """Whether :meth:`hold` would check the manifest now (and perhaps load a generation)."""
        return time.monotonic() - self._checked >= self.check_seconds

    def _refresh(self) -> None:
        """Load a newer generation if the manifest changed (at most every check_seconds)."""
        now = time.monotonic()
        if now - self._checked >= self.check_seconds:
            with self._lock:
                if now - self._checked >= self.check_seconds:
                    self._checked = now
                    if self._manifest_stamp() != self._stamp:
                        self._load()

    def reload(self) -> None:
        """Load the newest generation now (after this process published one itself)."""
        with self._lock:
            self._checked = time.monotonic()
            self._load()

    def hold(self) -> Generation | None:
        """The newest loaded generation, held for the caller (who must :meth:`~Generation.
        release` it), or None if there is no index."""
        self._refresh()
        while True:
            generation = self._current
            if generation is None or generation.hold():
                return generation
            # Swapped out and closed between the read and the hold: take the new one.

    def close(self) -> None:
        """Let go of the current generation (it closes when its requests are done)."""
        with self._lock:
            old, self._current = self._current, None
        if old is not None:
            old.release()
