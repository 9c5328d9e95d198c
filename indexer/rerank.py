"""Optional re-ranking of the top candidates with a cross-encoder.

Off by default: no re-ranking model ships in a package here. Point the
``reranker_path`` setting at a local sentence-transformers cross-encoder
folder to turn it on; quality gains need a real trained model.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Protocol

import numpy as np

from .embedding import quiet_offline
from .errors import ModelError


class Reranker(Protocol):
    """Scores (query, passage) pairs; higher is more relevant."""

    name: str

    def score(self, query: str, passages: Sequence[str]) -> np.ndarray:
        """One float per passage."""
        ...


class CrossEncoderReranker:
    """A local sentence-transformers CrossEncoder folder on the CPU."""

    def __init__(self, path: Path | str, *, batch_size: int = 32) -> None:
        path = Path(path)
        if not (path / "config.json").is_file():
            raise ModelError(
                f"reranker folder {path} holds no model (no config.json); set "
                "SOUNDING_RERANKER_PATH to a local cross-encoder folder, or leave it empty"
            )
        try:
            quiet_offline()
            from sentence_transformers import CrossEncoder

            self._model = CrossEncoder(str(path), device="cpu")
        except Exception as exc:
            raise ModelError(f"cannot load the reranker from {path}: {exc}") from exc
        self.name = path.name
        self.batch_size = batch_size

    def score(self, query: str, passages: Sequence[str]) -> np.ndarray:
        if not passages:
            return np.zeros(0, dtype=np.float32)
        scores = self._model.predict(
            [(query, p) for p in passages],
            batch_size=self.batch_size,
            show_progress_bar=False,
            convert_to_numpy=True,
        )
        return np.asarray(scores, dtype=np.float32).reshape(len(passages), -1)[:, 0]


def rerank(
    query: str, candidates: Sequence[tuple[int, str]], reranker: Reranker
) -> list[tuple[int, float]]:
    """(id, text) candidates re-ordered by the reranker's score, best first.

    Stable: equal scores keep the incoming order.
    """
    scores = reranker.score(query, [t for _, t in candidates])
    order = np.argsort(-scores, kind="stable")
    return [(candidates[i][0], float(scores[i])) for i in order]
