"""Vector index by size: python tests/bench/vectors.py [--sizes 10000 100000 1000000].

For each size, builds the exact index (IndexIDMap2(IndexFlatIP)), the automatic choice
(indexer.vectors.plan_vectors with the default threshold) and alternatives that were
tried (IVF forced below the threshold, IVF with 4·sqrt(n) cells, IVF with fp16 codes),
and prints per index: build time, FAISS bytes per chunk (file, anonymous memory once
loaded, and with faiss.IO_FLAG_MMAP*: anonymous plus file-backed pages after the
queries), single-query latency p50/p99 for k=10 and recall@10 against exact search.
Then SQLite bytes per chunk of real sounding.db files (--sqlite; default: the demo
corpus indexed with the bundled encoder), split by table with SQLite's dbstat.

Vectors: seeded synthetic 384-d unit vectors from a Gaussian mixture with a power-law
spectrum: n/50 component centres and per-point noise, both N(0, diag(s²)) with s_i² ∝
1/i (i = 1..384), summed, rotated by a random orthogonal matrix and L2-normalised;
queries are further draws from the same mixture. Its shape was chosen to match 27,874
real all-MiniLM-L6-v2 chunk vectors of the five shared benchmark collections queried
with their own encoded queries: mean top-1 / top-10 cosine 0.67 / 0.59 (real 0.67 /
0.53), IVF(333 cells),SQ8 recall@10 at nprobe 8/16/32 of 0.89/0.94/0.97 (real
0.91/0.95/0.98) — slightly harder than the real vectors.

Recall@10 is the 10-intersection measure (|approximate top 10 ∩ exact top 10| / 10,
averaged over queries) as in the FAISS benchmarks and ann-benchmarks (from memory).
Latency is search_vectors() (the reader's path) on one query at a time, measured in a
fresh process that loads the index file as the service does, with --threads FAISS
(OpenMP) threads. Nothing here asserts a time; the machine is shared, so the load
average is printed beside the figures.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import faiss
import numpy as np

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))

from sounding.indexer.vectors import (  # noqa: E402
    IVF,
    VectorPlan,
    build_vectors,
    calibrate_nprobe,
    describe_vectors,
    plan_vectors,
    search_vectors,
)

DIM = 384


def synthetic(n: int, queries: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """(n, 384) stored vectors and (queries, 384) query vectors; see the module docstring."""
    rng = np.random.default_rng(seed)
    scale = np.arange(1, DIM + 1, dtype=np.float32) ** -0.5
    scale *= np.sqrt(DIM) / np.linalg.norm(scale)  # mean square 1 per coordinate
    centres = rng.standard_normal((max(1, n // 50), DIM), dtype=np.float32) * scale
    rotation = np.linalg.qr(rng.standard_normal((DIM, DIM)))[0].astype(np.float32)
    out = np.empty((n + queries, DIM), dtype=np.float32)
    for start in range(0, n + queries, 100_000):  # in blocks: 1M x 384 float32 is 1.5 GB
        m = min(100_000, n + queries - start)
        block = centres[rng.integers(0, len(centres), m)]
        block += rng.standard_normal((m, DIM), dtype=np.float32) * scale
        block = block @ rotation
        out[start : start + m] = block / np.linalg.norm(block, axis=1, keepdims=True)
    return out[queries:], np.ascontiguousarray(out[:queries])


def recall_at_10(found: np.ndarray, exact: np.ndarray) -> float:
    return float(np.mean([len(set(a) & set(b)) / 10 for a, b in zip(found, exact, strict=True)]))


# --- measured in a fresh process ------------------------------------------------------------


def _status() -> dict[str, int]:
    out = {}
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(("RssAnon:", "RssFile:")):
            out[line.split(":")[0]] = int(line.split()[1]) * 1024
    return out


def probe(index_path: str, queries_path: str, flags: int, threads: int) -> None:
    """Child process: load the index, run single queries, print memory and latency as JSON."""
    faiss.omp_set_num_threads(threads)
    queries = np.load(queries_path)
    before = _status()
    index = faiss.read_index(index_path, flags)
    loaded = _status()
    search_vectors(index, queries[:5], 10)  # warm
    times = []
    for i in range(len(queries)):
        started = time.perf_counter()
        search_vectors(index, queries[i : i + 1], 10)
        times.append(time.perf_counter() - started)
    after = _status()
    _, found = search_vectors(index, queries, 10)
    print(
        json.dumps(
            {
                "anon": loaded["RssAnon"] - before["RssAnon"],
                "file": after["RssFile"] - before["RssFile"],
                "anon_after": after["RssAnon"] - before["RssAnon"],
                "p50": 1e3 * float(np.percentile(times, 50)),
                "p99": 1e3 * float(np.percentile(times, 99)),
                "found": found.tolist(),
            }
        )
    )


def measure(path: Path, queries_path: Path, threads: int, mmap: bool, kind: str) -> dict:
    # IVF: inverted lists mapped from the file; exact: the flat codes (IndexFlatCodes).
    # (The two flags do not combine: FAISS 1.15 then refuses the IVF file.)
    flags = 0 if not mmap else faiss.IO_FLAG_MMAP if kind == IVF else faiss.IO_FLAG_MMAP_IFC
    proc = subprocess.run(
        [
            sys.executable,
            __file__,
            "--probe",
            str(path),
            str(queries_path),
            str(flags),
            str(threads),
        ],
        capture_output=True,
        text=True,
        check=True,
    )
    return json.loads(proc.stdout.strip().splitlines()[-1])


# --- the table ------------------------------------------------------------------------------


def candidates(n: int, exact_below: int) -> list[tuple[str, VectorPlan]]:
    auto = plan_vectors(n, DIM, exact_below=exact_below)
    rows = [("exact", VectorPlan("exact")), (f"auto ({auto.kind})", auto)]
    if auto.kind != IVF:
        rows.append(("ivf forced", plan_vectors(n, DIM, kind="ivf")))
    else:
        nlist = auto.params["nlist"]
        rows.append(
            (
                "ivf 4·sqrt(n) cells",
                VectorPlan(
                    IVF, {"nlist": min(2 * nlist, n // 39), "quantizer": "SQ8", "nprobe": None}
                ),
            )
        )
        rows.append(("ivf SQfp16", VectorPlan(IVF, {**auto.params, "quantizer": "SQfp16"})))
    return rows


def bench_size(n: int, args: argparse.Namespace, workdir: Path) -> list[list[str]]:
    started = time.perf_counter()
    matrix, queries = synthetic(n, args.queries, seed=args.seed)
    print(f"\n# n = {n:,}: generated in {time.perf_counter() - started:.1f} s", flush=True)
    ids = np.arange(n, dtype=np.int64)
    queries_path = workdir / "queries.npy"
    np.save(queries_path, queries)
    _, exact_ids = faiss.knn(queries, matrix, 10, metric=faiss.METRIC_INNER_PRODUCT)
    rows = []
    for name, plan in candidates(n, args.exact_below):
        if name == "auto (exact)":
            continue  # the exact row
        alternative = not name.startswith(("exact", "auto"))
        if alternative and n > 200_000 and not args.all:
            continue  # minutes to build at 1M; --all includes them
        started = time.perf_counter()
        calibrated = ""
        if plan.kind == IVF:
            # What build_vectors does with nprobe None, in two steps to see the recall.
            index = build_vectors(
                VectorPlan(IVF, {**plan.params, "nprobe": 1}), ids, matrix, seed=args.seed
            )
            index.nprobe, self_recall = calibrate_nprobe(index, ids, matrix, seed=args.seed)
            calibrated = f"{self_recall:.3f}"
        else:
            index = build_vectors(plan, ids, matrix)
        build = time.perf_counter() - started
        params = describe_vectors(index)
        if plan.kind == IVF:
            name = f"{name} nlist={params['nlist']} nprobe={params['nprobe']}"
        path = workdir / "index.faiss"
        faiss.write_index(index, str(path))
        file_bytes = path.stat().st_size
        del index
        runs = [(t, False) for t in (args.threads[:1] if alternative else args.threads)]
        if args.mmap and not alternative:
            runs.append((args.threads[0], True))
        for threads, mmap in runs:
            r = measure(path, queries_path, threads, mmap, plan.kind)
            recall = recall_at_10(np.array(r["found"]), exact_ids)
            rows.append(
                [
                    f"{n:,}",
                    name + (" [mmap]" if mmap else ""),
                    str(threads),
                    f"{build:.1f}",
                    f"{file_bytes / n:.0f}",
                    f"{r['anon_after'] / n:.0f}",
                    f"{r['file'] / n:.0f}",
                    f"{r['p50']:.2f}",
                    f"{r['p99']:.2f}",
                    f"{recall:.3f}",
                    calibrated,
                ]
            )
            print("  " + " | ".join(rows[-1]), flush=True)
        path.unlink()
    return rows


HEADER = [
    "chunks",
    "index",
    "threads",
    "build s",
    "file B/chunk",
    "anon B/chunk",
    "mmap'd B/chunk",
    "p50 ms",
    "p99 ms",
    "recall@10",
    "calib. recall",
]


def sqlite_rows(paths: list[Path]) -> list[list[str]]:
    """Bytes per chunk of each sounding.db, by table (dbstat), and of the vector column."""
    import sqlite3

    rows = []
    for path in paths:
        conn = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True)
        chunks = conn.execute("SELECT count(*) FROM chunks").fetchone()[0]
        text, vec = conn.execute(
            "SELECT avg(length(text)), avg(length(vector)) FROM chunks"
        ).fetchone()
        sizes = dict(conn.execute("SELECT name, sum(pgsize) FROM dbstat GROUP BY name"))
        page = conn.execute("PRAGMA page_size").fetchone()[0]
        conn.close()
        fts = sum(v for k, v in sizes.items() if k.startswith("chunks_fts"))
        table = sizes.get("chunks", 0)
        rows.append(
            [
                str(path),
                f"{chunks:,}",
                f"{page}",
                f"{path.stat().st_size / chunks:.0f}",
                f"{table / chunks:.0f}",
                f"{fts / chunks:.0f}",
                f"{(path.stat().st_size - table - fts) / chunks:.0f}",
                f"{text:.0f}",
                f"{vec:.0f}",
            ]
        )
    return rows


def demo_index(workdir: Path) -> Path:
    from sounding.indexer.build import refresh_index
    from sounding.indexer.settings import IndexSettings

    settings = IndexSettings(index_dir=workdir / "demo-index")
    refresh_index([REPO / "demo_corpus"], settings, settings.embedder())
    return settings.index_dir / "sounding.db"


def table(header: list[str], rows: list[list[str]]) -> str:
    widths = [max(len(h), *(len(r[i]) for r in rows)) for i, h in enumerate(header)]

    def line(cells: list[str]) -> str:
        return "| " + " | ".join(c.ljust(w) for c, w in zip(cells, widths, strict=True)) + " |"

    return "\n".join(
        [line(header), "|" + "|".join("-" * (w + 2) for w in widths) + "|", *map(line, rows)]
    )


def main() -> None:
    if len(sys.argv) > 1 and sys.argv[1] == "--probe":
        probe(sys.argv[2], sys.argv[3], int(sys.argv[4]), int(sys.argv[5]))
        return
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[10_000, 100_000, 1_000_000])
    parser.add_argument("--queries", type=int, default=200, help="single queries timed")
    parser.add_argument(
        "--threads",
        type=int,
        nargs="+",
        default=[1],
        help="FAISS OpenMP threads while searching (builds use all cores)",
    )
    parser.add_argument(
        "--exact-below",
        type=int,
        default=None,
        help="threshold of the automatic choice (default: the setting's)",
    )
    parser.add_argument(
        "--no-mmap",
        dest="mmap",
        action="store_false",
        help="skip the rows that load the file with IO_FLAG_MMAP",
    )
    parser.add_argument(
        "--all",
        action="store_true",
        help="also build the alternatives above 200k chunks (minutes each)",
    )
    parser.add_argument(
        "--sqlite",
        type=Path,
        nargs="*",
        default=None,
        help="sounding.db files to report (default: index demo_corpus)",
    )
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    if args.exact_below is None:
        from sounding.indexer.vectors import DEFAULT_EXACT_BELOW

        args.exact_below = DEFAULT_EXACT_BELOW
    print(
        f"{os.cpu_count()} cores, load average {os.getloadavg()[0]:.2f}, faiss "
        f"{faiss.__version__}, exact_below {args.exact_below:,}"
    )
    started = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="sounding-vectors-") as tmp:
        workdir = Path(tmp)
        rows = [row for n in args.sizes for row in bench_size(n, args, workdir)]
        print("\n" + table(HEADER, rows))
        dbs = args.sqlite if args.sqlite else [demo_index(workdir)]
        print("\nSQLite bytes per chunk (B/chunk; text and vector: mean stored length)\n")
        print(
            table(
                [
                    "sounding.db",
                    "chunks",
                    "page",
                    "file",
                    "chunks table",
                    "FTS5",
                    "other",
                    "text",
                    "vector",
                ],
                sqlite_rows(dbs),
            )
        )
    print(f"\nload average {os.getloadavg()[0]:.2f}; total {time.perf_counter() - started:.0f} s")


if __name__ == "__main__":
    main()
