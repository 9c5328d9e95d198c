"""Encoder precision (auto, fp32, bf16), threads, and batching by length with order restored.

The fast tests use CPU-flag texts and a fake model; the slow one runs the real
encoder in both precisions over every chunk of the demo corpus.
"""

from __future__ import annotations

import logging

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import ValidationError
from sounding.indexer.chunking import ChunkSettings, chunk_document
from sounding.indexer.documents import Document
from sounding.indexer.embedding import (
    BF16_FLAGS,
    SentenceTransformerEmbedder,
    bundled_model_path,
    choose_precision,
    cpu_flags,
    encode_longest_first,
    usable_cores,
)
from sounding.indexer.errors import SettingsError
from sounding.indexer.loaders import iter_root
from sounding.indexer.settings import IndexSettings

from tests.conftest import DEMO_CORPUS

# Shortened /proc/cpuinfo texts: the layout of Linux's x86 and arm64 cpuinfo files.
X86_AMX = "processor\t: 0\nflags\t\t: fpu sse2 avx2 avx512f avx512_bf16 amx_bf16 amx_tile\n"
X86_OLD = "processor\t: 0\nflags\t\t: fpu sse2 avx2 avx512f\n"
ARM = "processor\t: 0\nFeatures\t: fp asimd bf16 sve\n"


def test_cpu_flags_parses_x86_and_arm_cpuinfo() -> None:
    assert {"avx512_bf16", "amx_bf16"} <= cpu_flags(X86_AMX)
    assert "avx512_bf16" not in cpu_flags(X86_OLD)
    assert "asimd" in cpu_flags(ARM)
    assert cpu_flags("") == frozenset()


@pytest.mark.parametrize(
    ("requested", "cpuinfo", "expected"),
    [
        ("auto", X86_AMX, "bf16"),
        ("auto", "flags : avx512_bf16\n", "bf16"),  # AVX512-BF16 without AMX
        ("auto", "flags : amx_bf16\n", "bf16"),
        ("auto", X86_OLD, "fp32"),
        ("auto", ARM, "fp32"),  # only the x86 flags are known to be fast here
        ("auto", "", "fp32"),
        ("fp32", X86_AMX, "fp32"),
        ("bf16", X86_AMX, "bf16"),
        ("bf16", X86_OLD, "bf16"),  # asked for explicitly: honoured, with a warning
    ],
)
def test_choose_precision(requested: str, cpuinfo: str, expected: str) -> None:
    assert choose_precision(requested, cpu_flags(cpuinfo)) == expected


def test_auto_falls_back_to_fp32_with_a_debug_line(caplog: pytest.LogCaptureFixture) -> None:
    with caplog.at_level(logging.DEBUG, logger="sounding.indexer.embedding"):
        assert choose_precision("auto", cpu_flags(X86_OLD)) == "fp32"
    assert any(r.levelno == logging.DEBUG and "fp32" in r.message for r in caplog.records)


def test_explicit_bf16_without_native_support_warns(caplog: pytest.LogCaptureFixture) -> None:
    with caplog.at_level(logging.WARNING, logger="sounding.indexer.embedding"):
        choose_precision("bf16", cpu_flags(X86_OLD))
    assert any("emulates" in r.message for r in caplog.records)


def test_unknown_precision_names_the_choices() -> None:
    with pytest.raises(SettingsError, match="fp16.*auto, fp32, bf16"):
        choose_precision("fp16", frozenset())


def test_usable_cores_is_the_affinity_mask() -> None:
    import os

    assert usable_cores() == len(os.sched_getaffinity(0))


def test_precision_and_threads_leave_the_fingerprint_alone_and_load_nothing() -> None:
    fp32 = SentenceTransformerEmbedder(precision="fp32", threads=1)
    bf16 = SentenceTransformerEmbedder(precision="bf16")
    assert fp32.fingerprint == bf16.fingerprint  # an fp32 index stays queryable in bf16
    assert (fp32.precision, bf16.precision) == ("fp32", "bf16")
    assert (fp32.threads, bf16.threads) == (1, usable_cores())
    assert fp32._model is None and bf16._model is None  # decided without loading torch


def test_settings_pass_precision_and_threads(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("SOUNDING_PRECISION", "fp32")
    monkeypatch.setenv("SOUNDING_THREADS", "1")
    embedder = IndexSettings().embedder()
    assert (embedder.requested_precision, embedder.precision, embedder.threads) == (
        "fp32",
        "fp32",
        1,
    )
    monkeypatch.delenv("SOUNDING_THREADS")
    assert IndexSettings().threads is None  # unset: every usable core


@pytest.mark.parametrize("bad", [{"precision": "fp16"}, {"threads": 0}])
def test_settings_refuse_bad_values(bad: dict) -> None:
    with pytest.raises(ValidationError):
        IndexSettings(**bad)


def test_embedder_refuses_zero_threads() -> None:
    with pytest.raises(SettingsError, match="threads=0"):
        SentenceTransformerEmbedder(threads=0)


# -- batching by length --------------------------------------------------------


@settings(max_examples=200, deadline=None)
@given(
    lengths=st.lists(st.integers(1, 300), min_size=1, max_size=80),
    batch_size=st.integers(1, 17),
)
def test_longest_first_batches_and_input_order(lengths: list[int], batch_size: int) -> None:
    texts = [f"t{i}" for i in range(len(lengths))]
    batches: list[list[str]] = []

    def encode_batch(batch: list[str]) -> np.ndarray:
        batches.append(batch)
        return np.array([[float(t[1:]), 1.0] for t in batch], dtype=np.float32)

    out = encode_longest_first(texts, lengths, batch_size, encode_batch)
    assert out.dtype == np.float32 and out.shape == (len(texts), 2)
    assert out[:, 0].tolist() == list(range(len(texts)))  # row i is text i again
    assert sorted(t for b in batches for t in b) == sorted(texts)  # each text once
    assert all(len(b) <= batch_size for b in batches)
    seen = [lengths[int(t[1:])] for b in batches for t in b]
    assert seen == sorted(lengths, reverse=True)  # longest first: like lengths share a batch


class _Rows:
    """What the fake model's encode returns: the tensor calls the embedder makes."""

    def __init__(self, rows: np.ndarray) -> None:
        self._rows = rows

    def float(self) -> _Rows:
        return self

    def numpy(self) -> np.ndarray:
        return self._rows


class _FakeModel:
    """Tokenizer and encode of a sentence-transformers model, without weights.

    A text's vector is (its number, 2): recognisable after reordering, and not
    of unit length, so the embedder's own normalisation shows.
    """

    max_seq_length = 256

    def __init__(self) -> None:
        self.batches: list[list[str]] = []

    def tokenizer(self, texts, **_) -> dict:
        return {"input_ids": [[0] * (len(t.split()) + 2) for t in texts]}

    def encode(self, texts, *, batch_size, convert_to_tensor, show_progress_bar) -> _Rows:
        assert convert_to_tensor and batch_size == len(texts)
        self.batches.append(list(texts))
        return _Rows(np.array([[float(t.split()[0]), 2.0] for t in texts], dtype=np.float32))


def test_encode_sorts_by_word_pieces_and_restores_order() -> None:
    embedder = SentenceTransformerEmbedder(batch_size=3, precision="fp32")
    fake = _FakeModel()
    embedder._model = fake
    rng = np.random.default_rng(3)
    texts = [f"{i} " + "w " * int(n) for i, n in enumerate(rng.integers(0, 50, size=11))]
    out = embedder.encode(texts)
    numbers = np.array([float(t.split()[0]) for t in texts])
    expected = np.stack([numbers, np.full(len(texts), 2.0)], axis=1)
    expected /= np.linalg.norm(expected, axis=1, keepdims=True)
    np.testing.assert_allclose(out, expected, rtol=1e-6)
    assert out.flags.c_contiguous and out.dtype == np.float32
    assert [len(b) for b in fake.batches] == [3, 3, 3, 2]
    pieces = [len(t.split()) for b in fake.batches for t in b]
    assert pieces == sorted(pieces, reverse=True)


def test_encode_of_one_batch_skips_the_sort() -> None:
    embedder = SentenceTransformerEmbedder(batch_size=8, precision="fp32")
    fake = _FakeModel()
    embedder._model = fake
    texts = ["1 a", "2 a b c", "3"]
    out = embedder.encode(texts)
    assert fake.batches == [texts]  # as given: one batch pads the same in any order
    assert out[:, 0].argsort().tolist() == [0, 1, 2]


# -- bf16 against fp32 on real text -----------------------------------------------


@pytest.mark.slow
def test_bf16_embeddings_match_fp32_on_every_demo_chunk() -> None:
    """Cosine(bf16, fp32) >= 0.995 for every chunk of the demo corpus.

    0.995 is the guard the project set for a precision change (issue 5); bf16
    keeps 8 mantissa bits against fp32's 23 (IEEE 754 / Google Brain bfloat16).
    """
    if not cpu_flags() & BF16_FLAGS:
        pytest.skip(
            f"this CPU has no native bf16 ({', '.join(sorted(BF16_FLAGS))} absent "
            "from /proc/cpuinfo): auto runs fp32 here, nothing to compare"
        )
    fp32 = SentenceTransformerEmbedder(bundled_model_path(), batch_size=32, precision="fp32")
    bf16 = SentenceTransformerEmbedder(bundled_model_path(), batch_size=32, precision="bf16")
    assert bf16.precision == "bf16" and fp32.fingerprint == bf16.fingerprint
    texts: list[str] = []
    for doc in iter_root(DEMO_CORPUS):
        if isinstance(doc, Document):
            texts += [c.embed_text for c in chunk_document(doc, fp32.tokenizer, ChunkSettings())]
    assert len(texts) > 100
    a, b = fp32.encode(texts), bf16.encode(texts)
    assert b.dtype == np.float32
    np.testing.assert_allclose(np.linalg.norm(b, axis=1), 1.0, atol=1e-5)
    cosine = (a * b).sum(axis=1)
    worst = int(cosine.argmin())
    assert cosine.min() >= 0.995, f"chunk {worst} {texts[worst][:80]!r}: cosine {cosine[worst]}"
