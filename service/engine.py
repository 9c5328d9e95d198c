"""The service's loaded resources: one encoder, and the current index generation."""

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


class Engine:
    """Holds a :class:`Searcher` over the newest complete index generation.

    The indexer publishes a generation by replacing ``manifest.json``
    atomically; the engine notices the change (checking at most every
    ``check_seconds``) and swaps in a reader of the new generation. Requests
    already running keep the searcher they started with.
    """

    def __init__(
        self,
        index_dir: Path,
        embedder: Embedder,
        make_searcher: Callable[[IndexReader], Searcher],
        check_seconds: float = 2.0,
    ) -> None:
        self.index_dir = Path(index_dir)
        self.embedder = embedder
        self.make_searcher = make_searcher
        self.check_seconds = check_seconds
        self._searcher: Searcher | None = None
        self._stamp: tuple[int, int] | None = None
        self._checked = 0.0
        self._lock = threading.Lock()
        self.error: str | None = None
        self._load()

    def _manifest_stamp(self) -> tuple[int, int] | None:
        try:
            st = (self.index_dir / MANIFEST).stat()
        except OSError:
            return None
        return (st.st_mtime_ns, st.st_ino)

    def _load(self) -> None:
        stamp = self._manifest_stamp()
        try:
            # A pinned reader sees one committed generation for as long as it lives.
            searcher = self.make_searcher(IndexReader(self.index_dir, pinned=True))
        except SoundingError as exc:
            # Keep serving the generation we have; report why the new one is not used.
            self.error = str(exc)
            if self._searcher is None:
                log.warning("no index loaded: %s", exc)
            else:
                log.error("keeping generation %s: %s", self._searcher.reader.generation, exc)
            self._stamp = stamp
            return
        old = self._searcher
        self._searcher, self._stamp, self.error = searcher, stamp, None
        docs, chunks = searcher.reader.counts()
        log.info(
            "index generation %s loaded: %s documents, %s chunks",
            searcher.reader.generation,
            docs,
            chunks,
        )
        # The old reader's snapshot ends when the last request using it lets go
        # (IndexReader.__del__), so requests in flight finish on their generation.
        del old

    def reload(self) -> None:
        """Load the newest generation now (after this process published one itself)."""
        with self._lock:
            self._checked = time.monotonic()
            self._load()

    def current(self) -> Searcher | None:
        """The searcher of the newest loaded generation, or None if there is no index."""
        now = time.monotonic()
        if now - self._checked >= self.check_seconds:
            with self._lock:
                if now - self._checked >= self.check_seconds:
                    self._checked = now
                    if self._manifest_stamp() != self._stamp:
                        self._load()
        return self._searcher
