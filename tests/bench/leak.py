"""Side-channel probes against a real server: hidden word counts from BM25, hidden words by time.

python tests/bench/leak.py [--hidden 1000] [--samples 150]

Indexes a small wiki (seeded fake encoder) with restricted pages (groups: [hr]), serves it
on real uvicorn over a loopback socket, and, as keys outside ``hr``:

1. the word-count probe: a write key with no groups pushes two pages of its own, P
   ("probeuniq probepair alpha bravo") and Q ("probepair"), then compares P's lexical scores
   for one word at a time. All of P's words occur once in P, so their BM25 scores differ only
   by idf = log((N - n + 0.5) / (n + 0.5)) (SQLite FTS5 docs, "The bm25() function"): the
   ratio of the scores of "probepair" (n = 2) and "probeuniq" (n = 1) gives N, then each
   word's score gives its n; n minus the hits the caller can see is the number of hidden
   chunks holding the word. The truth is printed beside it.
2. the timing probe: lexical searches for a word found only in hidden chunks and for an
   unknown word, interleaved, ``--samples`` each; prints whether a read key gets a
   Server-Timing header, its lexical stage (median) for both words, and the same for an
   admin key with no groups (who still gets the header), then the client's wall time.

Only HTTP and the package's public entry points, so it runs against older code too.
"""

from __future__ import annotations

import argparse
import math
import socket
import statistics
import tempfile
import threading
import time
from pathlib import Path

import httpx
import uvicorn

HIDDEN_COUNTS = {"alpha": 9, "bravo": 6}  # hidden chunks holding each word
VISIBLE_ALPHA = 2  # public pages holding "alpha"
ONLY_HIDDEN, UNKNOWN = "zulu", "qqqunknownword"
FILLER = [
    "river",
    "stone",
    "maple",
    "cloud",
    "harbor",
    "lantern",
    "meadow",
    "copper",
    "falcon",
    "willow",
]


def write_wiki(root: Path, hidden: int) -> None:
    root.mkdir(parents=True)
    for i in range(20):
        words = " ".join(FILLER[(i + j) % len(FILLER)] for j in range(6))
        extra = " alpha" if i < VISIBLE_ALPHA else ""
        (root / f"pub{i:03d}.md").write_text(f"# Public {i}\n\n{words}{extra} public.\n")
    for i in range(hidden):
        words = [FILLER[(i * 3 + j) % len(FILLER)] for j in range(5)] + [ONLY_HIDDEN]
        words += [w for w, n in HIDDEN_COUNTS.items() if i < n]
        (root / "hr" / f"h{i:04d}.md").parent.mkdir(exist_ok=True)
        (root / "hr" / f"h{i:04d}.md").write_text(
            f"---\ngroups: [hr]\n---\n# Secret {i}\n\n{' '.join(words)}.\n"
        )


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def lexical(client: httpx.Client, key: str, word: str) -> httpx.Response:
    return client.post(
        "/search",
        json={"query": word, "mode": "lexical", "k": 100},
        headers={"Authorization": f"Bearer {key}"},
    )


def stage(response: httpx.Response, name: str) -> float | None:
    for part in response.headers.get("server-timing", "").split(","):
        label, _, rest = part.strip().partition(";dur=")
        if label == name and rest:
            return float(rest)
    return None


def count_probe(client: httpx.Client, keys: dict[str, str]) -> None:
    auth = {"Authorization": f"Bearer {keys['writer']}"}
    for doc, text in (("probe/p", "probeuniq probepair alpha bravo"), ("probe/q", "probepair")):
        r = client.put(f"/documents/{doc}", json={"text": text, "format": "text"}, headers=auth)
        r.raise_for_status()

    def score_and_hits(word: str) -> tuple[float, int]:
        results = lexical(client, keys["writer"], word).json()["results"]
        mine = [r["score"] for r in results if r["document_id"] == "probe/p"]
        return mine[0], len(results)

    s1, _ = score_and_hits("probeuniq")
    s2, _ = score_and_hits("probepair")
    ratio = s2 / s1

    def idf(n: float, total: float) -> float:
        return max(1e-6, math.log((total - n + 0.5) / (n + 0.5)))

    # N from the two probe words: the ratio falls monotonically with N.
    total = min(range(4, 200_000), key=lambda t: abs(idf(2, t) / idf(1, t) - ratio))
    print(f"word-count probe (write key, no groups): chunks in BM25's statistics N = {total}")
    for word, truth in HIDDEN_COUNTS.items():
        s, seen = score_and_hits(word)
        e = math.exp(s / s1 * idf(1, total))
        n = (total + 0.5 - 0.5 * e) / (1 + e)
        print(
            f"  {word!r}: scores say {n:.2f} chunks hold it, the caller sees {seen}: "
            f"{round(n) - seen} hidden recovered (truth: {truth} hidden)"
        )


def timing_probe(client: httpx.Client, keys: dict[str, str], samples: int) -> None:
    for who in ("reader", "admin"):
        server: dict[str, list[float]] = {ONLY_HIDDEN: [], UNKNOWN: []}
        wall: dict[str, list[float]] = {ONLY_HIDDEN: [], UNKNOWN: []}
        headed = 0
        for _ in range(10):  # warm-up
            lexical(client, keys[who], ONLY_HIDDEN)
            lexical(client, keys[who], UNKNOWN)
        for _ in range(samples):
            for word in (ONLY_HIDDEN, UNKNOWN):
                started = time.perf_counter()
                r = lexical(client, keys[who], word)
                wall[word].append((time.perf_counter() - started) * 1e6)
                assert r.status_code == 200 and not r.json()["results"], r.text
                ms = stage(r, "lexical")
                if ms is not None:
                    headed += 1
                    server[word].append(ms * 1000)
        print(
            f"timing probe ({who} key, no groups): Server-Timing on {headed} of "
            f"{2 * samples} answers"
        )
        if server[ONLY_HIDDEN] and server[UNKNOWN]:
            a, b = statistics.median(server[ONLY_HIDDEN]), statistics.median(server[UNKNOWN])
            print(
                f"  lexical stage, median: hidden-only word {a:.1f} us, unknown word {b:.1f} us, "
                f"difference {a - b:+.1f} us"
            )
        a, b = statistics.median(wall[ONLY_HIDDEN]), statistics.median(wall[UNKNOWN])
        print(
            f"  client wall time, median: hidden-only word {a:.0f} us, unknown word {b:.0f} us, "
            f"difference {a - b:+.0f} us"
        )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--hidden", type=int, default=1000, help="restricted pages")
    parser.add_argument("--samples", type=int, default=150, help="timing samples per word")
    args = parser.parse_args()

    from sounding.indexer.build import refresh_index
    from sounding.indexer.embedding import HashingEmbedder
    from sounding.service.app import create_app
    from sounding.service.keys import KeyStore
    from sounding.service.settings import ServiceSettings

    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp) / "wiki"
        write_wiki(root, args.hidden)
        settings = ServiceSettings(
            index_dir=Path(tmp) / "index", reload_check_seconds=0, vector_index="exact"
        )
        embedder = HashingEmbedder(32, seed=7)
        refresh_index([root], settings, embedder)
        keys: dict[str, str] = {}
        with KeyStore(settings.keys_file) as store:
            for name, scope in (("reader", "read"), ("writer", "write"), ("admin", "admin")):
                keys[name] = store.create(name, scope, "", False)[1]
        port = free_port()
        config = uvicorn.Config(
            create_app(settings, embedder=embedder), port=port, log_level="warning"
        )
        server = uvicorn.Server(config)
        thread = threading.Thread(target=server.run, daemon=True)
        thread.start()
        while not server.started:
            time.sleep(0.05)
        try:
            with httpx.Client(base_url=f"http://127.0.0.1:{port}", timeout=60) as client:
                print(f"{args.hidden} restricted pages (groups [hr]), 20 public pages")
                timing_probe(client, keys, args.samples)
                count_probe(client, keys)
        finally:
            server.should_exit = True
            thread.join(timeout=30)


if __name__ == "__main__":
    main()
