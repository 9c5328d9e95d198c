"""The seeded, model-free encoder of tests (re-exported by :mod:`.embedding`)."""

from __future__ import annotations

import hashlib
import re
from collections.abc import Sequence

import numpy as np

from .chunking import Tokenizer


class WhitespaceTokenizer:
    """One token per run of letters/digits or per other non-space character."""

    _pattern = re.compile(r"\w+|[^\w\s]", re.UNICODE)

    def spans(self, text: str) -> list[tuple[int, int]]:
        return [m.span() for m in self._pattern.finditer(text)]


class HashingEmbedder:
    """A seeded, model-free encoder for tests of plumbing.

    Each word maps to a fixed random vector (seeded by its hash); a text is
    the normalised sum of its words' vectors. Texts sharing words are
    therefore similar, which is enough to test ranking plumbing end to end.
    """

    def __init__(self, dimension: int = 32, *, seed: int = 0, max_tokens: int = 256) -> None:
        self.name = f"hashing-{dimension}"
        self.fingerprint = f"hashing-{dimension}-{seed}"
        self.dimension = dimension
        self.max_tokens = max_tokens
        self.tokenizer: Tokenizer = WhitespaceTokenizer()
        self._seed = seed
        self.calls = 0
        self.texts_encoded = 0

    def _word(self, word: str) -> np.ndarray:
        # Big-endian, as Python 3.11+ defaults to (3.10 requires the argument).
        digest = hashlib.blake2b(f"{self._seed}:{word}".encode(), digest_size=8).digest()
        h = int.from_bytes(digest, "big")
        return np.random.default_rng(h).standard_normal(self.dimension).astype(np.float32)

    def encode(self, texts: Sequence[str]) -> np.ndarray:
        self.calls += 1
        self.texts_encoded += len(texts)
        out = np.zeros((len(texts), self.dimension), dtype=np.float32)
        for i, text in enumerate(texts):
            for word in re.findall(r"\w+", text.lower()):
                out[i] += self._word(word)
            if not out[i].any():
                out[i, 0] = 1.0
        out /= np.linalg.norm(out, axis=1, keepdims=True)
        return np.ascontiguousarray(out, dtype=np.float32)
