"""SIGKILL ``sounding index`` at random moments: the index always opens whole.

The real CLI indexes a corpus of over 2,000 chunks with a tiny, randomly initialised
sentence-transformers model built by the test (fast, and no download); the kill
moments are drawn from a seeded generator across the whole length of a run.
"""

from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from sounding.indexer.embedding import SentenceTransformerEmbedder, bundled_model_path
from sounding.indexer.search import Searcher
from sounding.indexer.store import IndexReader

pytestmark = [pytest.mark.slow, pytest.mark.subprocess]  # 44 runs of the command

TRIALS = 20
DOCS = 420
SECTIONS = 5  # one chunk each: over 2,000 chunks


@pytest.fixture(scope="module")
def tiny_model(tmp_path_factory: pytest.TempPathFactory) -> Path:
    import torch
    from sentence_transformers import SentenceTransformer, models
    from transformers import AutoTokenizer, BertConfig, BertModel

    torch.manual_seed(0)
    base = tmp_path_factory.mktemp("tiny-encoder")
    tok = AutoTokenizer.from_pretrained(str(bundled_model_path()))
    config = BertConfig(
        vocab_size=tok.vocab_size,
        hidden_size=32,
        num_hidden_layers=1,
        num_attention_heads=2,
        intermediate_size=64,
        max_position_embeddings=512,
    )
    BertModel(config).save_pretrained(base / "bert")
    tok.save_pretrained(base / "bert")
    word = models.Transformer(str(base / "bert"), max_seq_length=256)
    modules = [word, models.Pooling(word.get_embedding_dimension()), models.Normalize()]
    SentenceTransformer(modules=modules, device="cpu").save(str(base / "st"))
    return base / "st"


def write_corpus(root: Path, revision: int, rng: random.Random) -> set[str]:
    words = [f"w{i}" for i in range(400)]
    ids = set()
    for i in range(DOCS):
        sections = "\n\n".join(
            f"## Part {s}\n\nrev{revision} " + " ".join(rng.choices(words, k=60))
            for s in range(SECTIONS)
        )
        (root / f"doc-{i:03d}.md").write_text(f"# Document {i}\n\n{sections}\n")
        ids.add(f"doc-{i:03d}.md")
    return ids


def cli(*args: str) -> list[str]:
    return [sys.executable, "-m", "sounding.cli", *args]


def test_sigkill_at_random_moments_never_breaks_the_index(tmp_path: Path, tiny_model) -> None:
    rng = random.Random(20261202)
    root = tmp_path / "corpus"
    root.mkdir()
    idx = tmp_path / "idx"
    env = {k: v for k, v in os.environ.items() if not k.startswith("SOUNDING_")}
    env |= {"SOUNDING_INDEX_DIR": str(idx), "SOUNDING_MODEL_PATH": str(tiny_model)}
    ids = write_corpus(root, 0, rng)

    started = time.monotonic()
    first = subprocess.run(
        cli("index", str(root), "--quiet"), env=env, capture_output=True, text=True, timeout=600
    )
    run_seconds = time.monotonic() - started
    assert first.returncode == 0, first.stderr
    # A second, full re-index timed too: kills are spread over the shorter of the two, so a
    # first run slowed by other work on the machine does not send most kills past the end.
    write_corpus(root, TRIALS + 1, rng)
    started = time.monotonic()
    second = subprocess.run(
        cli("index", str(root), "--quiet"), env=env, capture_output=True, text=True, timeout=600
    )
    run_seconds = min(run_seconds, time.monotonic() - started)
    assert second.returncode == 0, second.stderr
    embedder = SentenceTransformerEmbedder(tiny_model)
    assert IndexReader(idx).counts()[1] >= 2000

    failures: list[str] = []
    killed_mid_run = 0
    for trial in range(TRIALS):
        write_corpus(root, trial + 1, rng)  # every document changes: a full re-index
        args = ["index", str(root), "--quiet"] + (["--rebuild"] if trial % 4 == 3 else [])
        proc = subprocess.Popen(
            cli(*args), env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
        )
        time.sleep(rng.uniform(0.0, run_seconds))
        os.kill(proc.pid, signal.SIGKILL)
        killed_mid_run += proc.wait() == -signal.SIGKILL
        check = subprocess.run(cli("check"), env=env, capture_output=True, text=True, timeout=300)
        if check.returncode != 0:
            failures.append(f"trial {trial}: check failed: {check.stdout.strip()}")
            continue
        reader = IndexReader(idx)
        docs, chunks = reader.counts()
        if docs != DOCS or chunks != reader.faiss_index.ntotal:
            failures.append(f"trial {trial}: {docs} documents, {chunks} chunks")
        revisions = {
            c.text.split()[0] for c in reader.chunks(list(reader.chunk_documents())).values()
        }
        if len(revisions) != 1:  # one generation, not a mix of two corpus revisions
            failures.append(f"trial {trial}: chunks of revisions {sorted(revisions)}")
        hits = Searcher(reader, embedder).search("w1 w2 w3", 5, mode="hybrid")
        if len(hits) != 5 or any(h.document_id not in ids for h in hits):
            failures.append(f"trial {trial}: search gave {[h.document_id for h in hits]}")
        reader.close()
    print(
        f"\nkill test: {TRIALS} trials, {killed_mid_run} killed mid-run, "
        f"{len(failures)} failures; one full run takes {run_seconds:.1f} s"
    )
    assert failures == []
    assert killed_mid_run >= TRIALS // 2  # most kills must land inside a run

    final = subprocess.run(
        cli("index", str(root), "--json"), env=env, capture_output=True, text=True, timeout=600
    )
    assert final.returncode == 0, final.stderr
    reader = IndexReader(idx)
    assert set(reader.chunk_documents().values()) == ids
    assert {c.text.split()[0] for c in reader.chunks(list(reader.chunk_documents())).values()} == {
        f"rev{TRIALS}"
    }
    assert subprocess.run(cli("check"), env=env, capture_output=True).returncode == 0
