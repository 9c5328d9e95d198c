"""Single-client query latency over HTTP, with where the time goes.

python tests/bench/latency.py [--chunks 100000] [--queries 300] [--cache DIR]
    [--variants off on] [--chars 2000]

Builds (or reuses) the synthetic index of tests/bench/load.py, starts `sounding serve`
as its own process on a free loopback port, warms it up, then sends one query at a
time (k=10) for each mode and prints end-to-end latency p50/p99 as the client sees it,
the per-stage breakdown the service reports in its Server-Timing header (encode,
dense, lexical, fusion, fetch, serialise; p50 of each), the part of the time spent
outside the search itself (HTTP, validation, auth, middleware), and the service's
resident memory. Queries are distinct, so nothing is answered from a cache.
The service runs with SOUNDING_TIMING_HEADER=true (Server-Timing goes only to admin keys
otherwise). ``--variants`` as in load.py (off: query batching off); ``--chars N`` makes
each query a paragraph of about N characters (words joined), as a chat bot sends.
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import httpx

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))

from tests.bench.load import build_synthetic, rss_mib, serving, variant_env  # noqa: E402

STAGES = ("encode", "dense", "lexical", "fusion", "fetch", "serialise")


def pct(values: list[float], q: float) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(q * len(ordered)))]


def server_timing(header: str) -> dict[str, float]:
    out: dict[str, float] = {}
    for part in header.split(","):
        name, _, rest = part.strip().partition(";dur=")
        if name and rest:
            out[name] = float(rest)
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--chunks", type=int, nargs="+", default=[100_000])
    parser.add_argument("--queries", type=int, default=300)
    parser.add_argument("--cache", type=Path, help="keep synthetic indexes here")
    parser.add_argument("--modes", nargs="+", default=["hybrid", "dense", "lexical"])
    parser.add_argument("--variants", nargs="+", default=["on"], help="off, on or settings")
    parser.add_argument("--chars", type=int, default=0, help="paragraph queries of ~N chars")
    args = parser.parse_args()
    scratch = tempfile.TemporaryDirectory()
    root = args.cache or Path(scratch.name)
    words = [f"term{i}" for i in range(5000)]
    print(
        f"{'chunks':>8} {'variant':<10}{'mode':<8}{'p50 ms':>8}{'p99 ms':>8}  "
        + "".join(f"{s:>10}" for s in STAGES)
        + f"{'other':>8}{'RSS MiB':>9}"
    )
    for n in args.chunks:
        index_dir = root / f"synthetic-{n}"
        build_synthetic(index_dir, n)
        for variant in args.variants:
            env = variant_env(variant) | {"SOUNDING_TIMING_HEADER": "true"}
            with (
                serving(index_dir, env) as (base, server),
                httpx.Client(base_url=base, timeout=30) as http,
            ):
                run_variant(http, server, n, variant, words, args)


def query_text(words: list[str], i: int, chars: int) -> str:
    """The i-th query: 2 to 4 words, or a paragraph of about ``chars`` characters."""
    if chars <= 0:
        return " ".join(words[(i * p) % 5000] for p in (7, 13, 31, 101)[: 2 + i % 3])
    out: list[str] = []
    j = 0
    while sum(len(w) + 1 for w in out) < chars:
        out.append(words[(i * 7919 + j * 31) % 5000])
        j += 1
    return " ".join(out)[:chars]


def run_variant(
    http: httpx.Client,
    server: subprocess.Popen,
    n: int,
    variant: str,
    words: list[str],
    args: argparse.Namespace,
) -> None:
    """One served variant: warm up, then the single-client table rows of each mode."""
    for i in range(30):  # warm-up: first-call costs (threads, caches, allocator)
        http.post("/search", json={"query": f"warm {words[i]}", "k": 10})
    for mode in args.modes:
        e2e: list[float] = []
        stages: dict[str, list[float]] = {s: [] for s in STAGES}
        inside: list[float] = []
        for i in range(args.queries):
            q = query_text(words, i, args.chars)
            started = time.perf_counter()
            r = http.post("/search", json={"query": q, "k": 10, "mode": mode})
            e2e.append((time.perf_counter() - started) * 1000)
            r.raise_for_status()
            timing = server_timing(r.headers.get("server-timing", ""))
            for s in STAGES:
                stages[s].append(timing.get(s, 0.0))
            inside.append(sum(timing.values()))
        other = statistics.median(e - t for e, t in zip(e2e, inside, strict=True))
        print(
            f"{n:>8} {variant[:9]:<10}{mode:<8}{pct(e2e, 0.5):>8.1f}{pct(e2e, 0.99):>8.1f}  "
            + "".join(f"{statistics.median(stages[s]):>10.2f}" for s in STAGES)
            + f"{other:>8.2f}{rss_mib(server.pid):>9.0f}",
            flush=True,
        )


if __name__ == "__main__":
    main()
