"""The query batcher: concurrent single queries share encoder calls, each gets its own row."""

from __future__ import annotations

import threading
import time
from collections.abc import Sequence

import numpy as np
import pytest
from sounding.indexer.batching import QueryBatcher
from sounding.indexer.embedding import HashingEmbedder


class Recording(HashingEmbedder):
    """The seeded fake, slowed down, remembering the size of every call."""

    def __init__(self, delay: float = 0.05) -> None:
        super().__init__(32, seed=5)
        self.delay = delay
        self.sizes: list[int] = []

    def encode(self, texts: Sequence[str]) -> np.ndarray:
        self.sizes.append(len(texts))
        time.sleep(self.delay)
        return super().encode(texts)


def concurrently(batcher: QueryBatcher, texts: list[str]) -> dict[str, np.ndarray]:
    """Encode each text alone from its own thread, all started together."""
    out: dict[str, np.ndarray] = {}
    start = threading.Barrier(len(texts))

    def one(text: str) -> None:
        start.wait()
        out[text] = batcher.encode([text])

    threads = [threading.Thread(target=one, args=(t,)) for t in texts]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=30)
    return out


def test_concurrent_queries_share_calls_and_each_gets_its_own_row() -> None:
    inner = Recording()
    batcher = QueryBatcher(inner, max_batch=8, wait_ms=0)
    texts = [f"pump {i} valve sluice {i * 7}" for i in range(24)]
    try:
        rows = concurrently(batcher, texts)
    finally:
        batcher.close()
    reference = HashingEmbedder(32, seed=5)
    for text in texts:
        assert rows[text].shape == (1, 32) and rows[text].dtype == np.float32
        np.testing.assert_array_equal(rows[text], reference.encode([text]))
    assert sum(inner.sizes) == len(texts)
    assert max(inner.sizes) <= 8
    assert len(inner.sizes) < len(texts)  # some were gathered into one call


def test_a_lone_query_does_not_wait() -> None:
    # The wait only applies while others are under way: one alone is sent at once.
    inner = Recording(delay=0)
    batcher = QueryBatcher(inner, max_batch=8, wait_ms=5000, in_flight=lambda: 1)
    try:
        started = time.monotonic()
        batcher.encode(["one question"])
        assert time.monotonic() - started < 2.5
    finally:
        batcher.close()
    assert inner.sizes == [1]


def test_waits_for_requests_under_way_and_stops_once_all_are_in() -> None:
    inner = Recording(delay=0)
    batcher = QueryBatcher(inner, max_batch=8, wait_ms=5000, in_flight=lambda: 2)
    try:
        started = time.monotonic()
        first = threading.Thread(target=batcher.encode, args=(["first"],))
        first.start()
        time.sleep(0.1)
        batcher.encode(["second"])
        first.join(timeout=10)
        # Both in one call, sent as soon as the second (of two under way) arrived.
        assert inner.sizes == [2]
        assert time.monotonic() - started < 2.5
    finally:
        batcher.close()


def test_an_encoder_error_reaches_every_waiter() -> None:
    class Broken(HashingEmbedder):
        def encode(self, texts: Sequence[str]) -> np.ndarray:
            raise RuntimeError("no encoder today")

    batcher = QueryBatcher(Broken(8), max_batch=4, wait_ms=0)
    errors: list[str] = []

    def one(i: int) -> None:
        try:
            batcher.encode([f"q{i}"])
        except RuntimeError as exc:
            errors.append(str(exc))

    threads = [threading.Thread(target=one, args=(i,)) for i in range(6)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=10)
    with pytest.raises(RuntimeError, match="no encoder today"):
        batcher.encode(["again"])
    batcher.close()
    assert errors == ["no encoder today"] * 6


def test_several_texts_bypass_the_queue_and_closed_refuses() -> None:
    inner = Recording(delay=0)
    batcher = QueryBatcher(inner, max_batch=4, wait_ms=0)
    rows = batcher.encode(["a", "b", "c"])
    assert rows.shape == (3, 32)
    assert batcher.batch_sizes == []  # ran in the caller's thread
    assert batcher.encode([]).shape == (0, 32)
    assert (batcher.name, batcher.dimension, batcher.max_tokens) == (
        inner.name,
        inner.dimension,
        inner.max_tokens,
    )
    batcher.close()
    with pytest.raises(RuntimeError, match="closed"):
        batcher.encode(["late"])


def test_threads_idle_for_a_lone_query_busy_for_a_batch() -> None:
    given: list[int] = []
    under_way = [1]
    inner = Recording(delay=0.05)
    batcher = QueryBatcher(
        inner,
        max_batch=8,
        wait_ms=0,
        in_flight=lambda: under_way[0],
        set_threads=given.append,
        idle_threads=2,
        busy_threads=1,
    )
    try:
        batcher.encode(["alone"])
        under_way[0] = 6
        concurrently(batcher, [f"q{i}" for i in range(6)])
    finally:
        batcher.close()
    assert given[0] == 2 and given[-1] == 1


@pytest.mark.slow
def test_batched_rows_equal_rows_encoded_alone_real_encoder() -> None:
    """fp32: a query encoded in a padded batch matches it alone to 1e-6; bf16 to the
    project's guard (cosine >= 0.995, tests/unit/test_precision.py)."""
    from sounding.indexer.embedding import SentenceTransformerEmbedder

    texts = [
        "pump",
        "who checks the sluice valves each week?",
        "reservoir levels logged hourly " * 12,
        "A chat bot sends a paragraph, not three words: " + "the standby engineer " * 60,
        "standby rota",
        "Wie viel Wasser fasst das Becken?",
    ]
    for precision, check in (("fp32", "exact"), ("bf16", "cosine")):
        enc = SentenceTransformerEmbedder(precision=precision, threads=1)  # type: ignore[arg-type]
        alone = np.vstack([enc.encode([t]) for t in texts])
        batcher = QueryBatcher(enc, max_batch=len(texts), wait_ms=0)
        try:
            together = concurrently(batcher, texts)
            direct = enc.encode(texts)  # one padded batch, as the worker sends it
        finally:
            batcher.close()
        for i, text in enumerate(texts):
            if check == "exact":
                np.testing.assert_allclose(together[text][0], alone[i], atol=1e-6, rtol=0)
                np.testing.assert_allclose(direct[i], alone[i], atol=1e-6, rtol=0)
            else:
                assert float(direct[i] @ alone[i]) >= 0.995
                assert float(together[text][0] @ alone[i]) >= 0.995


def test_a_busy_machine_keeps_a_lone_query_on_one_thread() -> None:
    given: list[int] = []
    batcher = QueryBatcher(
        Recording(delay=0),
        in_flight=lambda: 1,
        set_threads=given.append,
        idle_threads=2,
        busy_threads=1,
        machine_idle=lambda: False,
    )
    try:
        batcher.encode(["alone, beside a re-index"])
    finally:
        batcher.close()
    assert given == [1]
