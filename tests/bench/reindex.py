"""Time a first index of demo_corpus/ against a re-run on the unchanged corpus.

Usage: python tests/bench/reindex.py [CORPUS]

Uses the bundled encoder; model loading is excluded from both timings. The
second run must embed no chunk at all (exit status 1 otherwise).
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))

from sounding.indexer.build import refresh_index  # noqa: E402
from sounding.indexer.embedding import SentenceTransformerEmbedder  # noqa: E402
from sounding.indexer.settings import IndexSettings  # noqa: E402


def main(argv: list[str]) -> int:
    corpus = Path(argv[0]) if argv else REPO / "demo_corpus"
    started = time.monotonic()
    embedder = SentenceTransformerEmbedder(batch_size=64)
    embedder.encode(["warm-up"])  # the encoder loads lazily: load it before the clock starts
    print(f"model loaded in {time.monotonic() - started:.2f} s (not counted below)")
    with tempfile.TemporaryDirectory(prefix="sounding-bench-") as tmp:
        settings = IndexSettings(index_dir=Path(tmp) / "index", batch_size=64)
        runs = []
        for label in ("first index", "unchanged re-run"):
            started = time.monotonic()
            report = refresh_index([corpus], settings, embedder)
            seconds = time.monotonic() - started
            runs.append((seconds, report))
            print(
                f"{label:<17} {seconds:8.2f} s  chunks embedded {report.chunks_embedded:>5}  "
                f"({report.documents} documents, {report.chunks} chunks, "
                f"{len(report.skipped)} skipped)"
            )
    (first, _), (second, again) = runs
    print(f"ratio first / re-run: {first / second:.1f}x" if second else "re-run took no time")
    if again.chunks_embedded:
        print(f"FAIL: the unchanged re-run embedded {again.chunks_embedded} chunks, expected 0")
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
