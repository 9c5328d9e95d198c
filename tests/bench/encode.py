"""Encoder throughput per precision: python tests/bench/encode.py [--collection med].

For fp32 and bf16, on the demo corpus and on one shared benchmark collection
(chunked as ``sounding index`` chunks them, encoded in the groups of 512 chunks
``refresh_index`` hands the encoder), prints chunks/s and tokens/s of
``SentenceTransformerEmbedder.encode`` (batches sorted by word pieces), the
same texts through sentence-transformers' own ``encode`` (which sorts by
characters), single-query encode latency, and the fraction of this machine's
matrix-multiply peak the encoder reaches. The peak is measured in the same run
with large square ``torch.mm`` products in each precision.

FLOPs of the encoder, per text of ``L`` word pieces (a multiply-add is 2 FLOPs):
``L * (2 * N + 4 * layers * L * d)``, where ``N`` counts the weights of the
Linear layers of the transformer blocks (each used once per token) and
``4 * layers * L * d`` is the two attention products QK^T and AV per token.
This is the forward-pass count of Kaplan et al. 2020 ("Scaling Laws for Neural
Language Models", Table 1: 2N + 2 n_layer n_ctx d_attn) with the AV product
counted too; embedding look-ups, softmax, LayerNorm and GELU are left out.
"Executed" FLOPs use the padded length of each batch (what the hardware
computes), "useful" FLOPs each text's own length.

Times are wall clock on a shared machine: "best" is the fastest of --repeats
timed passes after one untimed warm pass (oneDNN builds kernels per shape on
first use), "cold" is that first pass.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))

import numpy as np  # noqa: E402
import torch  # noqa: E402
from sounding.indexer.build import _GROUP_CHUNKS  # noqa: E402
from sounding.indexer.chunking import ChunkSettings, chunk_document  # noqa: E402
from sounding.indexer.documents import Document  # noqa: E402
from sounding.indexer.embedding import (  # noqa: E402
    BF16_FLAGS,
    SentenceTransformerEmbedder,
    cpu_flags,
    usable_cores,
)
from sounding.indexer.evaluation import find_corpus, read_queries  # noqa: E402
from sounding.indexer.loaders import iter_root  # noqa: E402

DTYPES = {"fp32": torch.float32, "bf16": torch.bfloat16}


def matmul_peak(dtype: torch.dtype, n: int, seconds: float = 3.0) -> float:
    """FLOP/s of an n x n by n x n torch.mm, best of repeated products for ``seconds``."""
    a = torch.randn(n, n).to(dtype)
    b = torch.randn(n, n).to(dtype)
    torch.mm(a, b)  # warm: kernel choice, page faults
    best = float("inf")
    stop = time.perf_counter() + seconds
    while time.perf_counter() < stop:
        started = time.perf_counter()
        torch.mm(a, b)
        best = min(best, time.perf_counter() - started)
    return 2 * n**3 / best


def chunk_texts(root: Path, tokenizer, limit: int | None) -> list[str]:
    """embed_text of every chunk of ``root``, as the indexer would cut it."""
    texts: list[str] = []
    for doc in iter_root(root):
        if isinstance(doc, Document):
            texts += [c.embed_text for c in chunk_document(doc, tokenizer, ChunkSettings())]
            if limit and len(texts) >= limit:
                return texts[:limit]
    return texts


def linear_weights(embedder: SentenceTransformerEmbedder) -> tuple[int, int, int]:
    """(weights of the Linear layers of the transformer blocks, layers, hidden size)."""
    bert = embedder.model[0].auto_model
    n = sum(m.weight.numel() for m in bert.encoder.modules() if isinstance(m, torch.nn.Linear))
    return n, int(bert.config.num_hidden_layers), int(bert.config.hidden_size)


def flops(lengths: list[int], batch_size: int, n: int, layers: int, d: int) -> tuple[float, float]:
    """(executed, useful) FLOPs of encoding texts of these lengths, batched in the order given."""
    per = np.asarray(lengths, dtype=np.float64)

    def cost(length: np.ndarray | float) -> np.ndarray | float:
        return length * (2 * n + 4 * layers * length * d)

    useful = float(cost(per).sum())
    executed = 0.0
    for start in range(0, len(per), batch_size):
        batch = per[start : start + batch_size]
        executed += len(batch) * float(cost(batch.max()))
    return executed, useful


def timed(fn, repeats: int) -> tuple[float, float]:
    """(cold seconds, best warm seconds) of ``fn()``."""
    started = time.perf_counter()
    fn()
    cold = time.perf_counter() - started
    best = float("inf")
    for _ in range(repeats):
        started = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - started)
    return cold, best


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "--benchmarks",
        type=Path,
        default=REPO.parent / "shared" / "benchmarks",
        help="folder of BEIR-layout collections (default ../shared/benchmarks)",
    )
    parser.add_argument("--collection", default="med")
    parser.add_argument("--limit", type=int, default=None, help="at most this many chunks")
    parser.add_argument("--batch-size", type=int, default=32)
    parser.add_argument("--repeats", type=int, default=2)
    parser.add_argument("--threads", type=int, default=None, help="default: every usable core")
    parser.add_argument("--matmul-n", type=int, default=2048)
    parser.add_argument(
        "--precisions", nargs="+", default=["fp32", "bf16"], choices=["fp32", "bf16"]
    )
    args = parser.parse_args()

    threads = args.threads or usable_cores()
    torch.set_num_threads(threads)
    flags = sorted(cpu_flags() & BF16_FLAGS) or ["none"]
    print(f"torch {torch.__version__}, {threads} threads, native bf16 flags: {', '.join(flags)}")
    peaks = {p: matmul_peak(DTYPES[p], args.matmul_n) for p in args.precisions}

    probe = SentenceTransformerEmbedder(precision="fp32", threads=threads)
    n, layers, d = linear_weights(probe)
    print(
        f"encoder {probe.name}: N={n:,} Linear weights in {layers} blocks, d={d}; "
        f"FLOPs/text = L*(2N + 4*{layers}*L*{d})"
    )
    corpora = {
        "demo": REPO / "demo_corpus",
        args.collection: find_corpus(args.benchmarks / args.collection),
    }
    texts = {name: chunk_texts(root, probe.tokenizer, args.limit) for name, root in corpora.items()}
    queries = list(read_queries(args.benchmarks / args.collection / "queries.jsonl").values())[:50]

    head = (
        f"{'corpus':<10}{'prec':<6}{'path':<11}{'chunks':>7}{'tokens':>9}{'cold s':>8}"
        f"{'best s':>8}{'chunks/s':>10}{'tokens/s':>10}{'GFLOP/s':>9}{'% peak':>8}"
        f"{'pad %':>7}"
    )

    def line(r: dict) -> str:
        share = f"{100 * r['rate'] / peaks[r['precision']]:>8.1f}" if r["final"] else f"{'-':>8}"
        return (
            f"{r['corpus']:<10}{r['precision']:<6}{r['path']:<11}{r['chunks']:>7}"
            f"{r['tokens']:>9}{r['cold']:>8.2f}{r['best']:>8.2f}"
            f"{r['chunks'] / r['best']:>10.1f}{r['tokens'] / r['best']:>10.0f}"
            f"{r['rate'] / 1e9:>9.1f}{share}{r['pad']:>7.1f}"
        )

    print(head)
    rows: list[dict] = []
    latency: dict[str, float] = {}
    for precision in args.precisions:
        embedder = SentenceTransformerEmbedder(
            precision=precision, batch_size=args.batch_size, threads=threads
        )
        model = embedder.model
        embedder.encode([queries[0]])  # load and warm
        times = []
        for q in queries:
            started = time.perf_counter()
            embedder.encode([q])
            times.append(time.perf_counter() - started)
        latency[precision] = statistics.median(times) * 1000
        for name, chunk_list in texts.items():
            lengths = embedder.token_lengths(chunk_list)
            cost = {"sounding": (0.0, 0.0), "st-chars": (0.0, 0.0)}
            for i in range(0, len(chunk_list), _GROUP_CHUNKS):
                part = lengths[i : i + _GROUP_CHUNKS]
                chars = [len(t) for t in chunk_list[i : i + _GROUP_CHUNKS]]
                for path, order in (
                    ("sounding", sorted(part, reverse=True)),
                    ("st-chars", [part[j] for j in np.argsort([-c for c in chars], kind="stable")]),
                ):
                    ex, us = flops(order, args.batch_size, n, layers, d)
                    cost[path] = (cost[path][0] + ex, cost[path][1] + us)
            # Both paths get the chunks in the groups refresh_index hands the encoder.
            groups = [
                chunk_list[i : i + _GROUP_CHUNKS] for i in range(0, len(chunk_list), _GROUP_CHUNKS)
            ]
            paths = {
                "sounding": lambda g=groups, e=embedder: [e.encode(t) for t in g],
                # sentence-transformers' own encode: it sorts by characters.
                "st-chars": lambda g=groups, m=model: [
                    m.encode(
                        t,
                        batch_size=args.batch_size,
                        convert_to_tensor=True,
                        show_progress_bar=False,
                    )
                    for t in g
                ],
            }
            for path, fn in paths.items():
                cold, best = timed(fn, args.repeats)
                executed, useful = cost[path]
                rows.append(
                    {
                        "corpus": name,
                        "precision": precision,
                        "path": path,
                        "chunks": len(chunk_list),
                        "tokens": sum(lengths),
                        "cold": cold,
                        "best": best,
                        "rate": executed / best,
                        "pad": (1 - useful / executed) * 100,
                        "final": False,
                    }
                )
                print(line(rows[-1]), flush=True)
    # The peak is measured again after the encoder ran and the higher figure kept: on a
    # shared machine a neighbour can take a core during either measurement.
    for p in args.precisions:
        before, after = peaks[p], matmul_peak(DTYPES[p], args.matmul_n)
        peaks[p] = max(before, after)
        print(
            f"matmul peak {p}: {peaks[p] / 1e9:,.0f} GFLOP/s (torch.mm {args.matmul_n}^2, "
            f"best of 3 s; before {before / 1e9:,.0f}, after {after / 1e9:,.0f})"
        )
    print(head)
    for r in rows:
        r["final"] = True
        print(line(r))
    print(
        "sounding: batches sorted by word pieces; st-chars: sentence-transformers' encode, "
        "sorted by characters. GFLOP/s and % peak count executed FLOPs (padded batches); "
        "pad % = share of them spent on padding"
    )
    for precision, ms in latency.items():
        print(
            f"single-query encode p50 {precision}: {ms:.1f} ms "
            f"({len(queries)} {args.collection} queries, one at a time)"
        )


if __name__ == "__main__":
    main()
