"""Queries that arrive together, encoded together: one encoder call per batch.

A MiniLM forward pass over eight short queries costs far less than eight passes of
one, yet the service's requests each encode their own query. :class:`QueryBatcher`
stands in front of an encoder (it is an :class:`~sounding.indexer.embedding.Embedder`
itself): a request thread submits its single text and waits; one worker thread takes
whatever is queued (up to ``max_batch``), encodes it in one call and hands each
request its own row. A lone query goes at once: the worker waits (at most
``wait_ms``) for more only when the service says other requests are in flight.

Pure Python threading, no web imports: the service wires it in (service/app.py).
"""

from __future__ import annotations

import logging
import threading
import time
from collections import deque
from collections.abc import Callable, Sequence
from concurrent.futures import Future

import numpy as np

from .chunking import Tokenizer
from .embedding import Embedder

log = logging.getLogger("sounding.indexer")

__all__ = ["QueryBatcher"]


class QueryBatcher:
    """An :class:`Embedder` that gathers concurrent single-text calls into batches.

    ``in_flight`` (optional) tells how many requests the caller has under way,
    this one included; the worker waits up to ``wait_ms`` for a fuller batch only
    while more are under way than it holds. Without it the worker never waits:
    it batches only what queued up while the previous batch ran.

    ``set_threads`` (optional, e.g. ``torch.set_num_threads``) lets the worker
    run a lone query on ``idle_threads`` when nothing else is under way, and every
    other batch on ``busy_threads``: a second core speeds a long query's encoding
    on an idle machine, but under load the cores are taken already. ``machine_idle``
    (optional) says whether the machine has cores to spare (the service asks the
    load average), checked before a lone query gets ``idle_threads``.

    Calls with more or fewer than one text (pushes, evaluation) bypass the queue
    and run in the caller's thread, so a large push never holds up queries.
    """

    def __init__(
        self,
        inner: Embedder,
        *,
        max_batch: int = 8,
        wait_ms: float = 2.0,
        in_flight: Callable[[], int] | None = None,
        set_threads: Callable[[int], None] | None = None,
        idle_threads: int = 1,
        busy_threads: int = 1,
        machine_idle: Callable[[], bool] | None = None,
    ) -> None:
        if max_batch < 1:
            raise ValueError(f"max_batch={max_batch} must be 1 or more")
        if wait_ms < 0:
            raise ValueError(f"wait_ms={wait_ms} must be 0 or more")
        self.inner = inner
        self.max_batch = max_batch
        self.wait_s = wait_ms / 1000
        self._in_flight = in_flight
        self._set_threads = set_threads
        self.idle_threads = idle_threads
        self.busy_threads = busy_threads
        self._machine_idle = machine_idle
        self._threads: int | None = None  # what set_threads was last given
        self._queue: deque[tuple[str, Future[np.ndarray]]] = deque()
        self._ready = threading.Condition()
        self._closed = False
        self.batch_sizes: list[int] = []  # recent batch sizes (bounded), for tests and benches
        self._worker = threading.Thread(target=self._run, name="query-batcher", daemon=True)
        self._worker.start()

    # -- the Embedder protocol, delegated --------------------------------------

    @property
    def name(self) -> str:
        return self.inner.name

    @property
    def fingerprint(self) -> str:
        return self.inner.fingerprint

    @property
    def dimension(self) -> int:
        return self.inner.dimension

    @property
    def max_tokens(self) -> int:
        return self.inner.max_tokens

    @property
    def tokenizer(self) -> Tokenizer:
        return self.inner.tokenizer

    def encode(self, texts: Sequence[str]) -> np.ndarray:
        """Rows of ``texts``; a single text waits for its row from the worker's batch."""
        if len(texts) != 1:
            return self.inner.encode(texts)
        future: Future[np.ndarray] = Future()
        with self._ready:
            if self._closed:
                raise RuntimeError("the query batcher is closed")
            self._queue.append((texts[0], future))
            self._ready.notify()
        return future.result()

    def close(self) -> None:
        """Stop the worker once the queue is empty; later calls are refused."""
        with self._ready:
            self._closed = True
            self._ready.notify_all()
        self._worker.join(timeout=30)

    # -- the worker ------------------------------------------------------------

    def _others(self) -> int:
        return self._in_flight() if self._in_flight is not None else 0

    def _take(self) -> list[tuple[str, Future[np.ndarray]]] | None:
        """The next batch: what is queued, after a short wait if more are on their way."""
        with self._ready:
            while not self._queue:
                if self._closed:
                    return None
                self._ready.wait()
            batch = [self._queue.popleft() for _ in range(min(self.max_batch, len(self._queue)))]
            if len(batch) < self.max_batch and self.wait_s > 0 and self._others() > len(batch):
                deadline = time.monotonic() + self.wait_s
                while len(batch) < self.max_batch:
                    if not self._queue:
                        left = deadline - time.monotonic()
                        # Stop early once every request under way is in this batch.
                        if left <= 0 or self._others() <= len(batch):
                            break
                        self._ready.wait(left)
                        continue
                    batch.append(self._queue.popleft())
            return batch

    def _threads_for(self, size: int) -> None:
        if self._set_threads is None:
            return
        alone = size == 1 and self._others() <= 1
        # Only when the machine is idle too: beside a re-index that takes every core, a
        # second torch thread made a lone query's encoding 7x slower (tests/bench/latency.py).
        if alone and self._machine_idle is not None:
            alone = self._machine_idle()
        wanted = self.idle_threads if alone else self.busy_threads
        if wanted != self._threads:
            self._set_threads(wanted)
            self._threads = wanted

    def _run(self) -> None:
        while (batch := self._take()) is not None:
            live = [(text, f) for text, f in batch if f.set_running_or_notify_cancel()]
            if not live:
                continue
            try:
                self._threads_for(len(live))
                rows = self.inner.encode([text for text, _ in live])
            except BaseException as exc:  # noqa: BLE001 - every waiter gets the error
                for _, future in live:
                    future.set_exception(exc)
                continue
            if len(self.batch_sizes) >= 10_000:
                del self.batch_sizes[:5_000]
            self.batch_sizes.append(len(live))
            for i, (_, future) in enumerate(live):
                # A copy: each request owns its row, nothing shared between requests.
                future.set_result(np.array(rows[i : i + 1], dtype=np.float32, copy=True))
