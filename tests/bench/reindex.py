"""Time a first index against a re-run, and end to end against the encoder alone.

Usage: python tests/bench/reindex.py [CORPUS] [--precision auto|fp32|bf16] [--repeats N]
       python tests/bench/reindex.py --pipeline [--collection scifact] [--precision bf16]

Uses the bundled encoder; model loading is excluded from every timing.

Default: a first index of CORPUS (demo_corpus/) and a re-run on the unchanged
corpus, which must embed no chunk at all (exit status 1 otherwise).

``--pipeline``: a first build of a shared collection end to end, walking in
the caller's thread (``pipelined=False``, the sequential path) and with the
producer thread (the default), beside the encoder alone on the same chunks in
the groups ``refresh_index`` hands it. The three are interleaved per repeat,
so a neighbour's load on a shared machine falls on all of them alike; the
ratio to the encoder alone is what the pipeline is for (loading, chunking,
SQLite and FTS5 overlapped with encoding).
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))

from sounding.indexer.build import _GROUP_CHUNKS, refresh_index  # noqa: E402
from sounding.indexer.chunking import chunk_document  # noqa: E402
from sounding.indexer.documents import Document  # noqa: E402
from sounding.indexer.embedding import SentenceTransformerEmbedder  # noqa: E402
from sounding.indexer.evaluation import find_corpus  # noqa: E402
from sounding.indexer.loaders import iter_root  # noqa: E402
from sounding.indexer.settings import IndexSettings  # noqa: E402


def first_and_rerun(corpus: Path, embedder: SentenceTransformerEmbedder) -> int:
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


def pipeline(corpus: Path, embedder: SentenceTransformerEmbedder, repeats: int) -> int:
    settings = IndexSettings(batch_size=embedder.batch_size)
    texts = [
        c.embed_text
        for d in iter_root(corpus)
        if isinstance(d, Document)
        for c in chunk_document(d, embedder.tokenizer, settings.chunking)
    ]
    groups = [texts[i : i + _GROUP_CHUNKS] for i in range(0, len(texts), _GROUP_CHUNKS)]
    best: dict[str, float] = {}
    with tempfile.TemporaryDirectory(prefix="sounding-bench-") as tmp:
        for r in range(repeats):
            for label in ("encoder only", "sequential", "pipelined"):
                started = time.monotonic()
                if label == "encoder only":
                    for g in groups:
                        embedder.encode(g)
                else:
                    run = IndexSettings(
                        index_dir=Path(tmp) / f"{label}-{r}", batch_size=embedder.batch_size
                    )
                    report = refresh_index([corpus], run, embedder, pipelined=label == "pipelined")
                    assert report.chunks == len(texts), (report.chunks, len(texts))
                seconds = time.monotonic() - started
                best[label] = min(best.get(label, seconds), seconds)
                print(
                    f"repeat {r + 1} {label:<13} {seconds:8.2f} s  "
                    f"{len(texts) / seconds:7.1f} chunks/s  (load {os.getloadavg()[0]:.1f})",
                    flush=True,
                )
    print(f"{'best of ' + str(repeats):<20}{'seconds':>9}{'chunks/s':>10}{'of encoder':>12}")
    for label, seconds in best.items():
        share = best["encoder only"] / seconds
        print(f"{label:<20}{seconds:9.2f}{len(texts) / seconds:10.1f}{100 * share:11.0f}%")
    return 0


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("corpus", nargs="?", type=Path, default=REPO / "demo_corpus")
    parser.add_argument("--pipeline", action="store_true")
    parser.add_argument("--collection", default="scifact")
    parser.add_argument("--benchmarks", type=Path, default=REPO.parent / "shared" / "benchmarks")
    parser.add_argument("--precision", default="auto", choices=["auto", "fp32", "bf16"])
    parser.add_argument("--repeats", type=int, default=1)
    args = parser.parse_args()
    started = time.monotonic()
    # --pipeline: the batch size of `sounding index` (IndexSettings), as its figures are.
    batch = IndexSettings().batch_size if args.pipeline else 64
    embedder = SentenceTransformerEmbedder(batch_size=batch, precision=args.precision)
    embedder.encode(["warm-up"])  # the encoder loads lazily: load it before the clock starts
    print(
        f"model loaded in {time.monotonic() - started:.2f} s (not counted below); "
        f"{embedder.precision}, {embedder.threads} threads, load {os.getloadavg()}"
    )
    if args.pipeline:
        return pipeline(find_corpus(args.benchmarks / args.collection), embedder, args.repeats)
    return first_and_rerun(args.corpus, embedder)


if __name__ == "__main__":
    sys.exit(main())
