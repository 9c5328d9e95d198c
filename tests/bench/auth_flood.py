"""Median latency of a valid key while many clients send wrong secrets (finding 10).

Starts ``sounding``'s app on a loopback port in a child process (a small index of test
pages, the seeded fake encoder), measures a valid key's median and p95 latency of
``GET /collections`` alone, then while ``--clients`` threads send wrong secrets for another
key's id, and prints both with the flood's statuses. ``--flood unknown`` sends random
unknown ids instead; ``--flood nokey`` sends no key at all, the cost of any flood of
cheap refusals on this machine, for comparison.

    python tests/bench/auth_flood.py [--clients 48] [--requests 200] [--flood known]
"""

from __future__ import annotations

import argparse
import collections
import os
import secrets
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import httpx

SERVER = """
import sys, uvicorn
from pathlib import Path
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.service.app import create_app
from sounding.service.settings import ServiceSettings
root, port = Path(sys.argv[1]), int(sys.argv[2])
settings = ServiceSettings(index_dir=root / "index", reload_check_seconds=0)
embedder = HashingEmbedder(32, seed=1)
refresh_index([root / "wiki"], settings, embedder)
uvicorn.run(create_app(settings, embedder=embedder), host="127.0.0.1", port=port,
            log_level="warning", access_log=False)
"""


def free_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def latencies(client: httpx.Client, secret: str, n: int) -> list[float]:
    out = []
    for _ in range(n):
        start = time.perf_counter()
        r = client.get("/collections", headers={"Authorization": f"Bearer {secret}"})
        out.append((time.perf_counter() - start) * 1000)
        r.raise_for_status()
    return out


def summary(ms: list[float]) -> str:
    ms = sorted(ms)
    return f"median {statistics.median(ms):7.1f} ms   p95 {ms[int(0.95 * len(ms)) - 1]:7.1f} ms"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--clients", type=int, default=48)
    parser.add_argument("--requests", type=int, default=200)
    parser.add_argument("--flood", choices=["known", "unknown", "nokey"], default="known")
    args = parser.parse_args()

    from sounding.service.keys import KeyStore

    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        (root / "wiki").mkdir()
        for i in range(20):
            (root / "wiki" / f"page{i}.md").write_text(f"# Page {i}\n\nPump {i} restarts.\n")
        with KeyStore(root / "index" / "keys.db") as store:
            _, valid = store.create("owner", "read")
            _, target = store.create("target", "read")
        port = free_port()
        env = dict(os.environ, SOUNDING_LOG_FORMAT="text")
        server = subprocess.Popen(
            [sys.executable, "-c", SERVER, str(root), str(port)], env=env, cwd=tmp
        )
        base = f"http://127.0.0.1:{port}"
        try:
            deadline = time.monotonic() + 120
            while True:
                try:
                    httpx.get(f"{base}/health", timeout=2).raise_for_status()
                    break
                except httpx.HTTPError:
                    if time.monotonic() > deadline or server.poll() is not None:
                        raise SystemExit("the server did not start") from None
                    time.sleep(0.2)
            with httpx.Client(base_url=base, timeout=60) as client:
                latencies(client, valid, 20)  # warm: the owner's key is verified once
                quiet = latencies(client, valid, args.requests)
                stop = threading.Event()
                statuses: collections.Counter[int] = collections.Counter()

                def flood() -> None:
                    bad = target[:-1] + ("A" if target[-1] != "A" else "B")
                    with httpx.Client(base_url=base, timeout=60) as c:
                        while not stop.is_set():
                            if args.flood == "unknown":
                                bad = f"snd_{secrets.token_hex(6)}_{target[17:]}"
                            headers = (
                                {} if args.flood == "nokey" else {"Authorization": f"Bearer {bad}"}
                            )
                            r = c.get("/collections", headers=headers)
                            statuses[r.status_code] += 1

                threads = [threading.Thread(target=flood) for _ in range(args.clients)]
                for t in threads:
                    t.start()
                time.sleep(2)  # let the flood build up
                started = time.monotonic()
                loud = latencies(client, valid, args.requests)
                seconds = time.monotonic() - started
                stop.set()
                for t in threads:
                    t.join()
        finally:
            server.terminate()
            server.wait(30)
    kind = {
        "known": "wrong secrets, one known key id",
        "unknown": "random unknown key ids",
        "nokey": "no key at all",
    }[args.flood]
    print(f"valid key, GET /collections, {args.requests} requests each")
    print(f"  alone:                         {summary(quiet)}")
    print(f"  during {args.clients} clients sending {kind}: {summary(loud)}")
    total = sum(statuses.values())
    shares = ", ".join(f"{code}: {n}" for code, n in sorted(statuses.items()))
    print(f"  flood answers: {total} in about {seconds + 2:.0f} s ({shares})")


if __name__ == "__main__":
    main()
