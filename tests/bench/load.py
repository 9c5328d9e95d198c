"""Load on loopback: python tests/bench/load.py [--chunks N ...] [--clients 8] [--seconds 20].

``--variants off on`` serves each index once per variant, one after the other in one run:
``off`` with query batching off (SOUNDING_QUERY_BATCH=1: each request encodes its own
query, as before batching), ``on`` with the defaults; any other variant is a list of
SOUNDING_ settings, e.g. ``SOUNDING_QUERY_BATCH=16,SOUNDING_QUERY_BATCH_WAIT_MS=4``
(or ``PYTHONPATH=...`` to serve another copy of the code, such as the last commit's).

For each index size, builds (or reuses, under --cache) a synthetic index: documents of
10 chunks whose text draws Zipf-distributed words from a 5,000-word vocabulary and whose
vectors are clustered synthetic unit vectors (tests/bench/vectors.py), stamped with the
bundled encoder's identity so the real service opens it. Starts `sounding serve` as its own
process on a free loopback port, then drives POST /search with N concurrent clients for a
bounded time per mode (dense, lexical, hybrid), queries encoded for real by the service.
Prints throughput, p50/p95/p99 latency and errors, and the service's resident memory.
"""

from __future__ import annotations

import argparse
import os
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import httpx
import numpy as np

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))

from sounding.indexer.chunking import Chunk, ChunkSettings  # noqa: E402
from sounding.indexer.documents import Document, Section  # noqa: E402
from sounding.indexer.embedding import SentenceTransformerEmbedder, describe  # noqa: E402
from sounding.indexer.store import IndexWriter, Manifest  # noqa: E402
from sounding.indexer.vectors import plan_vectors  # noqa: E402


def build_synthetic(index_dir: Path, n_chunks: int, seed: int = 0) -> None:
    """A synthetic index of ``n_chunks`` chunks (skipped when one of that size exists)."""
    try:
        manifest = Manifest.read(index_dir)
        wanted = plan_vectors(n_chunks, manifest.model["dimension"]).kind
        if manifest.chunks == n_chunks and manifest.vectors.get("kind") == wanted:
            return
    except Exception:  # noqa: BLE001 - no usable index yet: build it
        pass
    from tests.bench.vectors import synthetic

    rng = np.random.default_rng(seed)
    vocab = [f"term{i}" for i in range(5000)]
    model = describe(SentenceTransformerEmbedder())
    # Clustered like real chunk vectors, so the automatic FAISS index is sized as in use.
    all_vectors, _ = synthetic(n_chunks - n_chunks % 10, 0, seed)
    with IndexWriter(index_dir, model, ChunkSettings(), rebuild=True) as writer:
        for d in range(n_chunks // 10):
            ranks = np.minimum(rng.zipf(1.3, size=10 * 80), 5000) - 1
            words = [vocab[r] for r in ranks]
            chunks = [
                Chunk(
                    ordinal=j,
                    trail=(f"Part {j}",),
                    text=" ".join(words[j * 80 : (j + 1) * 80]),
                    embed_text="",
                    tokens=90,
                )
                for j in range(10)
            ]
            doc = Document(
                id=f"doc-{d:06d}",
                title=f"Synthetic page {d}",
                source="synthetic",
                modified=0.0,
                content_hash=str(d),
                kind="text",
                sections=(Section((), "x"),),
            )
            writer.put(doc, "synthetic", chunks, all_vectors[d * 10 : (d + 1) * 10])
        writer.publish()


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def rss_mib(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    return float("nan")


@contextmanager
def serving(
    index_dir: Path, extra_env: dict[str, str] | None = None
) -> Iterator[tuple[str, subprocess.Popen]]:
    """`sounding serve` on a free loopback port, keys off, once its index is loaded;
    ``extra_env`` adds SOUNDING_ settings (the caller's own SOUNDING_ variables are dropped)."""
    port = free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith("SOUNDING_")}
    server = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "sounding.cli",
            "serve",
            "--index",
            str(index_dir),
            "--port",
            str(port),
        ],
        env=env
        | {
            "SOUNDING_LOG_LEVEL": "warning",
            "SOUNDING_MAX_K": "100",
            "SOUNDING_REQUIRE_KEYS": "false",
        }
        | (extra_env or {}),
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        # Not the checkout: a variant may import another copy of sounding (PYTHONPATH),
        # which the checkout's own folder, first on sys.path under -m, would shadow.
        cwd=index_dir.parent,
    )
    base = f"http://127.0.0.1:{port}"
    try:
        for _ in range(600):
            try:
                if httpx.get(f"{base}/health", timeout=2).json().get("index_loaded"):
                    break
            except httpx.HTTPError:
                pass
            time.sleep(0.2)
        yield base, server
    finally:
        server.terminate()
        server.wait(timeout=30)


def drive(base: str, mode: str, clients: int, seconds: float) -> tuple[list[float], int, float]:
    latencies: list[float] = []
    errors = 0
    lock = threading.Lock()
    queries = [f"term{i} term{i * 7 % 5000} term{i * 13 % 5000}" for i in range(1, 500)]
    stop_at = time.monotonic() + seconds

    def client(n: int) -> None:
        nonlocal errors
        with httpx.Client(base_url=base, timeout=30) as http:
            i = n
            while time.monotonic() < stop_at:
                started = time.perf_counter()
                try:
                    r = http.post(
                        "/search", json={"query": queries[i % len(queries)], "k": 10, "mode": mode}
                    )
                    ok = r.status_code == 200
                except httpx.HTTPError:
                    ok = False
                elapsed = (time.perf_counter() - started) * 1000
                with lock:
                    if ok:
                        latencies.append(elapsed)
                    else:
                        errors += 1
                i += clients

    started = time.monotonic()
    threads = [threading.Thread(target=client, args=(n,)) for n in range(clients)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    return latencies, errors, time.monotonic() - started


def variant_env(variant: str) -> dict[str, str]:
    """The SOUNDING_ settings of a --variants entry."""
    if variant == "on":
        return {}
    if variant == "off":
        return {"SOUNDING_QUERY_BATCH": "1"}
    return dict(item.split("=", 1) for item in variant.split(","))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--chunks", type=int, nargs="+", default=[10_000, 100_000])
    parser.add_argument("--clients", type=int, default=8)
    parser.add_argument("--seconds", type=float, default=20.0)
    parser.add_argument("--cache", type=Path, help="keep synthetic indexes here")
    parser.add_argument("--modes", nargs="+", default=["dense", "lexical", "hybrid"])
    parser.add_argument("--variants", nargs="+", default=["on"], help="off, on or settings")
    args = parser.parse_args()
    scratch = tempfile.TemporaryDirectory()
    root = args.cache or Path(scratch.name)
    print(
        f"{'chunks':>8} {'variant':<10}{'mode':<8}{'req/s':>8}{'p50 ms':>8}{'p95 ms':>8}"
        f"{'p99 ms':>8}{'errors':>8}{'RSS MiB':>9}"
    )
    for n in args.chunks:
        index_dir = root / f"synthetic-{n}"
        build_synthetic(index_dir, n)
        for variant in args.variants:
            with serving(index_dir, variant_env(variant)) as (base, server):
                for mode in args.modes:
                    drive(base, mode, args.clients, 2.0)  # warm
                    lat, errors, wall = drive(base, mode, args.clients, args.seconds)
                    q = (
                        statistics.quantiles(lat, n=100, method="inclusive")
                        if len(lat) > 1
                        else [0.0] * 99
                    )
                    print(
                        f"{n:>8} {variant[:9]:<10}{mode:<8}{len(lat) / wall:>8.1f}{q[49]:>8.1f}"
                        f"{q[94]:>8.1f}{q[98]:>8.1f}{errors:>8}{rss_mib(server.pid):>9.0f}",
                        flush=True,
                    )


if __name__ == "__main__":
    main()
