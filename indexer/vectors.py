"""The FAISS index over the chunk vectors, chosen by the collection's size.

Two kinds, both keyed by SQLite's chunk ids and scoring by inner product
(cosine on the encoder's L2-normalised vectors):

- ``exact``: ``IndexIDMap2(IndexFlatIP)``, brute force, every score exact.
  Used below ``exact_below`` chunks, where a scan of every vector is a few
  milliseconds.
- ``ivf``: ``IndexIVFScalarQuantizer`` (factory string ``IVF{nlist},SQ8``):
  k-means cells over the vectors, each vector stored as one byte per
  dimension in its nearest cell; a query scans the ``nprobe`` nearest cells.
  It takes ids with ``add_with_ids`` and drops them with ``remove_ids``, so a
  re-index changes it in place like the exact one (HNSW cannot remove ids).

Parameters come from measurements (``tests/bench/vectors.py``; figures in
DEVELOPERS.md): ``nlist`` = 2·sqrt(n), trained on 64·nlist sampled vectors
with 10 k-means iterations; ``nprobe`` is calibrated on the data when the
index is built: the smallest one whose recall@10 against brute force, for
256 stored vectors used as queries, reaches ``RECALL_TARGET``. Stored
vectors as queries overrate recall a little against real queries (measured
on the shared collections: 0.98 self-recall gave 0.97 for their queries),
so the target sits above the 0.95 the service promises.

Nothing here touches SQLite: callers pass ids and an (n, d) float32 matrix.
Arrays follow FAISS conventions: float32 C-contiguous vectors, int64 ids,
``D, I`` results of shape (m, k) padded with ``-1`` ids.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field
from typing import Any, Literal, cast

import faiss
import numpy as np

from .errors import SettingsError

log = logging.getLogger(__name__)
# faiss's bundled type hints are generated from its C++ headers: they lack the keyword
# constructors of its search parameters (SearchParameters(sel=…)), which exist at run time.
_FAISS: Any = faiss

EXACT = "exact"
IVF = "ivf"
KINDS = ("auto", EXACT, IVF)
VectorKind = Literal["auto", "exact", "ivf"]

# Below this many chunks the exact index is used (measured: ~5 ms a query at 50k on one
# core of the 2-core box, and the IVF's k-means adds seconds to a build for little gain).
DEFAULT_EXACT_BELOW = 50_000
# Cells per sqrt(n): 2 measured best for build time at equal latency and recall at 100k
# and 1M (more cells needed about the same fraction of them probed).
LISTS_PER_SQRT = 2.0
# Training points per cell: FAISS warns under 39 per centroid and subsamples above 256
# (faiss/Clustering.h); 64 trained as well as 256 in the measurements, 4x faster.
TRAIN_PER_LIST = 64
MIN_PER_LIST = 39
KMEANS_ITERATIONS = 10  # 10 and 25 gave the same recall at 100k (0.967 vs 0.969)
RECALL_TARGET = 0.98
CALIBRATION_QUERIES = 256
# needs_rebuild: retrain once the planned nlist is this far from the trained one,
# i.e. once the collection has grown or shrunk about 4x since training.
NLIST_DRIFT = 2.0
_SQ_NAMES = {
    faiss.ScalarQuantizer.QT_8bit: "SQ8",
    faiss.ScalarQuantizer.QT_4bit: "SQ4",
    faiss.ScalarQuantizer.QT_6bit: "SQ6",
    faiss.ScalarQuantizer.QT_fp16: "SQfp16",
}


@dataclass(frozen=True)
class VectorChoice:
    """What the settings ask for: a kind (or ``auto``), the threshold, an nprobe override."""

    kind: VectorKind = "auto"
    exact_below: int = DEFAULT_EXACT_BELOW
    nprobe: int | None = None


DEFAULT_CHOICE = VectorChoice()


@dataclass(frozen=True)
class VectorPlan:
    """Which index to build and with what parameters; JSON-able for the manifest."""

    kind: str
    params: dict[str, Any] = field(default_factory=dict)

    def to_json(self) -> dict[str, Any]:
        return {"kind": self.kind, **self.params}

    @classmethod
    def from_json(cls, data: dict[str, Any] | None) -> VectorPlan:
        """The plan a manifest records; a manifest from before plans existed means exact."""
        if not data:
            return cls(EXACT)
        params = {k: v for k, v in data.items() if k != "kind"}
        return cls(str(data.get("kind", EXACT)), params)


def plan_vectors(
    n: int,
    dimension: int,
    *,
    kind: str = "auto",
    exact_below: int = DEFAULT_EXACT_BELOW,
    nprobe: int | None = None,
) -> VectorPlan:
    """The index for ``n`` vectors of ``dimension``: exact below ``exact_below``, else IVF.

    ``kind`` forces one; an IVF of no vectors cannot be trained, so it is exact.
    ``nprobe`` None means calibrate it when building.
    """
    if kind not in KINDS:
        raise SettingsError(f"vector index kind {kind!r} is unknown; use one of {', '.join(KINDS)}")
    if dimension < 1:
        raise ValueError(f"dimension must be positive, got {dimension}")
    if kind == EXACT or n <= 0 or (kind == "auto" and n < exact_below):
        return VectorPlan(EXACT)
    nlist = _nlist(n)
    return VectorPlan(
        IVF,
        {
            "nlist": nlist,
            "quantizer": "SQ8",
            "nprobe": None if nprobe is None else max(1, min(int(nprobe), nlist)),
        },
    )


def _nlist(n: int) -> int:
    return max(1, min(round(LISTS_PER_SQRT * math.sqrt(n)), n // MIN_PER_LIST))


def build_vectors(
    plan: VectorPlan, ids: np.ndarray, matrix: np.ndarray, *, seed: int = 0
) -> faiss.Index:
    """A new index of ``plan``'s kind holding ``matrix`` rows under ``ids``.

    IVF: trains on a seeded sample, adds everything, then sets ``nprobe`` (the
    plan's, or calibrated on ``matrix``).
    """
    ids = np.ascontiguousarray(ids, dtype=np.int64)
    matrix = np.ascontiguousarray(matrix, dtype=np.float32)
    if matrix.ndim != 2 or len(matrix) != len(ids):
        raise ValueError(f"matrix must have shape (len(ids), d), got {matrix.shape}")
    d = matrix.shape[1]
    if plan.kind == EXACT:
        # Inner product on L2-normalised vectors is cosine similarity.
        exact = faiss.IndexIDMap2(faiss.IndexFlatIP(d))
        if len(ids):
            exact.add_with_ids(matrix, ids)
        return exact
    if plan.kind != IVF:
        raise ValueError(f"unknown vector plan kind {plan.kind!r}")
    if not len(ids):
        raise ValueError("an IVF index needs vectors to train on")
    nlist = int(plan.params["nlist"])
    quantizer = plan.params.get("quantizer", "SQ8")
    # Typed loosely: faiss's generated hints miss what its Python wrappers add (cp, nprobe
    # on the factory's IVF, numpy forms of train/add, keyword search parameters).
    index: Any = faiss.index_factory(d, f"IVF{nlist},{quantizer}", faiss.METRIC_INNER_PRODUCT)
    index.cp.niter = KMEANS_ITERATIONS
    rng = np.random.default_rng(seed)
    size = min(len(ids), TRAIN_PER_LIST * nlist)
    sample = matrix if size == len(ids) else matrix[np.sort(rng.choice(len(ids), size, False))]
    index.train(sample)
    index.add_with_ids(matrix, ids)
    nprobe = plan.params.get("nprobe")
    if nprobe is None:
        nprobe, recall = calibrate_nprobe(index, ids, matrix, seed=seed)
        log.info(
            "IVF over %d vectors: nlist %d, calibrated nprobe %d (recall@10 %.3f)",
            len(ids),
            nlist,
            nprobe,
            recall,
        )
    index.nprobe = int(min(nprobe, nlist))
    return cast(faiss.Index, index)


def calibrate_nprobe(
    index: faiss.Index,
    ids: np.ndarray,
    matrix: np.ndarray,
    *,
    target: float = RECALL_TARGET,
    queries: int = CALIBRATION_QUERIES,
    k: int = 10,
    seed: int = 0,
) -> tuple[int, float]:
    """Smallest nprobe whose recall@k reaches ``target``, and that recall.

    Queries are stored vectors, each left out of its own results. A hit is a
    returned vector scoring at least the exact k-th score (less 1e-5), so
    duplicate chunks (equal scores) count whichever copy comes back.
    """
    ivf = faiss.extract_index_ivf(index)
    n = len(ids)
    kk = min(k, n - 1)
    if kk < 1:
        return ivf.nlist, 1.0
    rng = np.random.default_rng(seed)
    rows = np.sort(rng.choice(n, min(queries, n), replace=False))
    q = np.ascontiguousarray(matrix[rows])
    exact_d, rank = faiss.knn(q, matrix, kk + 1, metric=faiss.METRIC_INNER_PRODUCT)
    exact_i = ids[rank]
    # The k-th best score with the query itself left out.
    kth = np.array([d[i != r][kk - 1] for d, i, r in zip(exact_d, exact_i, ids[rows], strict=True)])
    order = np.argsort(ids, kind="stable")
    sorted_ids = ids[order]

    def recall(nprobe: int) -> float:
        _, found = index.search(q, kk + 1, params=_FAISS.SearchParametersIVF(nprobe=nprobe))
        hits = 0
        for j in range(len(rows)):
            got = found[j][(found[j] >= 0) & (found[j] != ids[rows[j]])][:kk]
            at = order[np.searchsorted(sorted_ids, got)]
            hits += int(np.count_nonzero(matrix[at] @ q[j] >= kth[j] - 1e-5))
        return hits / (kk * len(rows))

    # Double until the target is met, then bisect between the last miss and the hit.
    low, high, got = 0, 1, recall(1)
    while got < target and high < ivf.nlist:
        low, high = high, min(2 * high, ivf.nlist)
        got = recall(high)
    while high - low > 1:
        mid = (low + high) // 2
        r = recall(mid)
        if r >= target:
            high, got = mid, r
        else:
            low = mid
    return high, got


def plan_of(index: faiss.Index) -> VectorPlan:
    """The plan an existing index follows (what the manifest records of it)."""
    ivf = _ivf(index)
    if ivf is None:
        return VectorPlan(EXACT)
    quantizer = "flat"
    if isinstance(ivf, faiss.IndexIVFScalarQuantizer):
        quantizer = _SQ_NAMES.get(ivf.sq.qtype, f"SQ-type-{ivf.sq.qtype}")
    return VectorPlan(
        IVF, {"nlist": int(ivf.nlist), "quantizer": quantizer, "nprobe": int(ivf.nprobe)}
    )


def describe_vectors(index: faiss.Index) -> dict[str, Any]:
    """The manifest's ``vectors`` entry: kind and parameters."""
    return plan_of(index).to_json()


def needs_rebuild(index: faiss.Index, n: int, choice: VectorChoice = DEFAULT_CHOICE) -> bool:
    """Whether ``index`` should be built anew for a collection of ``n`` vectors.

    True when the choice now names the other kind (the threshold was crossed
    either way, or a setting forces a kind) or when an IVF's cells were
    trained for a collection about 4x smaller or larger than ``n``.
    """
    want = plan_vectors(n, index.d, kind=choice.kind, exact_below=choice.exact_below)
    have = plan_of(index)
    if want.kind != have.kind:
        return True
    if want.kind == IVF:
        ratio = want.params["nlist"] / have.params["nlist"]
        return (
            not 1 / NLIST_DRIFT <= ratio <= NLIST_DRIFT
            or have.params["quantizer"] != want.params["quantizer"]
        )
    return False


def plan_is_current(
    described: dict[str, Any] | None, n: int, dimension: int, choice: VectorChoice
) -> bool:
    """Whether a manifest's ``vectors`` entry for ``n`` vectors already is what ``choice``
    asks for, so a run that changed no document has nothing to rebuild or publish."""
    have = VectorPlan.from_json(described)
    want = plan_vectors(
        n, dimension, kind=choice.kind, exact_below=choice.exact_below, nprobe=choice.nprobe
    )
    if want.kind != have.kind:
        return False
    if want.kind != IVF:
        return True
    if have.params.get("quantizer") != want.params["quantizer"]:
        return False
    return choice.nprobe is None or have.params.get("nprobe") == want.params["nprobe"]


def index_ids(index: faiss.Index) -> np.ndarray:
    """Every id the index holds (int64; order unspecified)."""
    ivf = _ivf(index)
    if ivf is None:
        mapped: Any = index  # an IndexIDMap2 (exact plan)
        return faiss.vector_to_array(mapped.id_map).astype(np.int64)
    lists: Any = ivf.invlists
    parts = []
    for cell in range(ivf.nlist):
        size = lists.list_size(cell)
        if size:
            ptr = lists.get_ids(cell)
            parts.append(faiss.rev_swig_ptr(ptr, size).astype(np.int64))
            lists.release_ids(cell, ptr)
    return np.concatenate(parts) if parts else np.empty(0, dtype=np.int64)


def search_vectors(
    index: faiss.Index,
    queries: np.ndarray,
    k: int,
    *,
    selector: faiss.IDSelector | None = None,
    allowed: int | None = None,
    nprobe: int | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Top ``k`` ids by inner product: ``D`` scores and ``I`` ids, shape (m, k), ``-1`` pads.

    ``selector`` keeps only the ids it accepts, before the top-k cut. With an
    IVF, ``allowed`` (how many ids the selector accepts, if known) widens
    ``nprobe`` by ntotal/allowed, so a query scans about as many accepted
    vectors as an unfiltered one (measured: recall@10 at 10% and 2% of the
    ids accepted fell to 0.95 and 0.84 without it, 0.99 with it, real
    vectors); a query that still finds fewer than ``k`` accepted ids is
    searched again over every cell. Never changes ``index`` (thread-safe).
    """
    queries = np.ascontiguousarray(queries, dtype=np.float32)
    ivf = _ivf(index)
    if ivf is None:
        params = None if selector is None else _FAISS.SearchParameters(sel=selector)
        return index.search(queries, k, params=params)
    probe = int(nprobe or ivf.nprobe)
    if selector is not None and allowed is not None:
        probe = math.ceil(probe * ivf.ntotal / max(1, allowed))
    probe = max(1, min(probe, ivf.nlist))
    D, I = index.search(queries, k, params=_ivf_params(probe, selector))
    if selector is not None and probe < ivf.nlist:
        short = np.flatnonzero((I < 0).any(axis=1))
        if short.size:
            D2, I2 = index.search(queries[short], k, params=_ivf_params(ivf.nlist, selector))
            D[short], I[short] = D2, I2
    return D, I


def _ivf_params(nprobe: int, selector: faiss.IDSelector | None) -> faiss.SearchParametersIVF:
    params: faiss.SearchParametersIVF = (
        _FAISS.SearchParametersIVF(nprobe=nprobe)
        if selector is None
        else _FAISS.SearchParametersIVF(nprobe=nprobe, sel=selector)
    )
    return params


def _ivf(index: faiss.Index) -> faiss.IndexIVF | None:
    if isinstance(index, faiss.IndexIVF):
        return index
    return None
