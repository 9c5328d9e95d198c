"""The life of a FAISS file: read it, rebuild it from the stored vectors, keep it in step, write it.

A FAISS file is derived data: every chunk row in SQLite keeps its vector, so
whatever is missing or unreadable here can be rebuilt. Nothing here touches
SQLite either: callers pass a :data:`VectorSource`, a function that returns
ids and an (n, d) float32 matrix of stored vectors (all of them for None).
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import faiss
import numpy as np

from .vectors import (
    KINDS,
    VectorChoice,
    VectorPlan,
    build_vectors,
    index_ids,
    needs_rebuild,
    plan_vectors,
)

VectorSource = Callable[[Sequence[int] | None], tuple[np.ndarray, np.ndarray]]


def temporary_path(path: Path) -> Path:
    """Where ``path`` is written before it replaces the real one.

    A hidden ``.tmp`` name beside it, so a writer can tell (and delete) what a dead run left.
    """
    return path.with_name(f".{path.name}.tmp")


def read_vector_file(path: Path, *, mmap: bool = False) -> faiss.Index | None:
    """The index stored at ``path``; None when it is missing or unreadable.

    ``mmap`` maps an IVF's lists instead of reading them (enough to describe it).
    """
    if not path.is_file():
        return None
    try:
        if mmap:
            return faiss.read_index(str(path), faiss.IO_FLAG_MMAP)
        return faiss.read_index(str(path))
    except RuntimeError:
        return None


def write_vector_file(index: faiss.Index, path: Path) -> None:
    """Write ``index`` to ``path`` atomically: a temporary file, fsync, then replace.

    OSError or RuntimeError (from FAISS) when it cannot; nothing is left behind then.
    """
    tmp = temporary_path(path)
    try:
        faiss.write_index(index, str(tmp))
        os.chmod(tmp, 0o600)  # vectors derive from document text: owner-only (store/modes.py)
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except (OSError, RuntimeError):
        tmp.unlink(missing_ok=True)
        raise


def build_all(source: VectorSource, dimension: int, choice: VectorChoice) -> faiss.Index:
    """A new index over every stored vector, of the kind ``choice`` plans for their number."""
    ids, matrix = source(None)
    plan = plan_vectors(
        len(ids), dimension, kind=choice.kind, exact_below=choice.exact_below, nprobe=choice.nprobe
    )
    return build_vectors(plan, ids, matrix)


def recorded_choice(recorded: dict[str, Any] | None) -> VectorChoice:
    """The choice that rebuilds what a manifest's ``vectors`` entry records: its kind
    (``auto`` for a kind this version does not know) and its nprobe."""
    plan = VectorPlan.from_json(recorded)
    kind = plan.kind if plan.kind in KINDS else "auto"
    return VectorChoice(kind=kind, nprobe=plan.params.get("nprobe"))  # type: ignore[arg-type]


def load_or_rebuild(
    path: Path, recorded: dict[str, Any] | None, dimension: int, source: VectorSource
) -> faiss.Index:
    """The index at ``path``, or, when it is missing or unreadable, one rebuilt in memory
    from ``source`` following the plan the manifest ``recorded``."""
    index = read_vector_file(path)
    if index is None:
        index = build_all(source, dimension, recorded_choice(recorded))
    return index


def in_step(
    index: faiss.Index | None,
    want: np.ndarray,
    dimension: int,
    source: VectorSource,
    choice: VectorChoice,
) -> faiss.Index:
    """``index`` holding exactly the ids ``want``: stale ids removed, missing ones added.

    Changed in place while its kind still suits the collection's size; built
    anew from ``source`` when there is none, its dimension is wrong, or
    :func:`~indexer.vectors.needs_rebuild` says so.
    """
    if index is not None and index.d != dimension:
        index = None
    if index is None or needs_rebuild(index, len(want), choice):
        return build_all(source, dimension, choice)
    if choice.nprobe is not None and isinstance(index, faiss.IndexIVF):
        index.nprobe = min(choice.nprobe, index.nlist)
    have = index_ids(index)
    stale = np.setdiff1d(have, want, assume_unique=True)
    if len(stale):
        index.remove_ids(stale)  # type: ignore[arg-type]  # faiss wraps numpy ids at run time
    missing = np.setdiff1d(want, have, assume_unique=True)
    if len(missing):
        ids, matrix = source(missing.tolist())
        index.add_with_ids(matrix, ids)
    return index
