"""A folder of built evaluation indexes, reused while nothing that shapes them changes.

Encoding a collection is the slow part of evaluating it (minutes on a CPU);
ranking it again in another mode is seconds. An entry is named by a key over
what determines the index's content:

- the bytes of the collection's corpus file,
- the encoder (the manifest's name, fingerprint, dimension and token limit)
  and the precision it runs in (bf16 vectors differ from fp32 ones),
- the chunk settings, the vector index settings, the file size limit and
  the access rules file's bytes,
- ``CACHE_VERSION``, bumped when the index layout changes.

The encoder's batch size is left out on purpose: it changes vectors only by
float rounding, and leaving it out lets a test session and ``sounding eval``
share one entry.

An entry is built with the normal indexer (:func:`refresh_index`) into a
temporary folder beside it and renamed into place only when complete, so an
interrupted build never leaves a half-built entry behind a valid key. Layout::

    CACHE_DIR/<collection>-<key>/index/       the index, as `sounding index` writes it
    CACHE_DIR/<collection>-<key>/build.json   the build's report and wall-clock seconds
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .build import RefreshReport, refresh_index
from .documents import Skipped
from .embedding import Embedder, describe
from .errors import IndexStoreError
from .settings import IndexSettings

CACHE_VERSION = 1
_BUILDING = ".building-"  # prefix of entries under construction: <prefix><name>-<pid>-<random>


@dataclass(frozen=True)
class CachedIndex:
    """An index of one collection's corpus, and how it was built."""

    index_dir: Path
    # Of the run that built it (read back from build.json when reused); None for an index
    # folder that existed already outside the cache.
    report: RefreshReport | None
    build_seconds: float
    reused: bool  # True when the cache had it; False when it was built just now
    key: str = ""


def cache_key(corpus: Path, settings: IndexSettings, embedder: Embedder) -> str:
    """Hex digest naming the index ``refresh_index([corpus], settings, embedder)`` builds."""
    digest = hashlib.sha256(_file_digest(corpus).encode())
    encoder = describe(embedder)  # loads a lazy model, which settles its precision
    shape = {
        "version": CACHE_VERSION,
        "encoder": encoder,
        "precision": getattr(embedder, "precision", "fp32"),
        "chunk_tokens": settings.chunk_tokens,
        "chunk_overlap": settings.chunk_overlap,
        "vectors": [settings.vector_index, settings.exact_below, settings.ivf_nprobe],
        "max_file_bytes": settings.max_file_bytes,  # may skip the corpus file
        "access_rules": _file_digest(settings.access_rules),  # groups stored per document
    }
    digest.update(json.dumps(shape, sort_keys=True, default=str).encode())
    return digest.hexdigest()[:24]


def _file_digest(path: Path | None) -> str:
    if path is None:
        return ""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def build_index(
    corpus: Path,
    settings: IndexSettings,
    embedder: Embedder,
    index_dir: Path,
    progress: Callable[[int, int], None] | None = None,
) -> tuple[RefreshReport, float]:
    """Index ``corpus`` into ``index_dir`` with the normal indexer; (report, seconds).
    ``progress(done, total)`` as chunks are embedded."""
    started = time.monotonic()
    build = settings.model_copy(update={"index_dir": Path(index_dir)})
    report = refresh_index([corpus], build, embedder, progress=progress)
    return report, time.monotonic() - started


def cached_index(
    corpus: Path,
    settings: IndexSettings,
    embedder: Embedder,
    cache_dir: Path,
    progress: Callable[[int, int], None] | None = None,
) -> CachedIndex:
    """The entry of ``cache_dir`` for this corpus, encoder and settings; built if missing."""
    cache_dir = Path(cache_dir)
    key = cache_key(corpus, settings, embedder)
    name = f"{corpus.parent.name or 'collection'}-{key}"
    entry = cache_dir / name
    found = _read_entry(entry, key)
    if found is not None:
        return found
    cache_dir.mkdir(parents=True, exist_ok=True)
    _sweep_abandoned(cache_dir, name)
    scratch = Path(tempfile.mkdtemp(prefix=f"{_BUILDING}{name}-{os.getpid()}-", dir=cache_dir))
    try:
        report, seconds = build_index(corpus, settings, embedder, scratch / "index", progress)
        meta = {"key": key, "seconds": seconds, "report": report.to_json()}
        (scratch / "build.json").write_text(json.dumps(meta, indent=2), encoding="utf-8")
        try:
            scratch.rename(entry)  # atomic: the entry appears whole or not at all
        except OSError:
            # Another process finished the same entry first; theirs is as good as ours.
            found = _read_entry(entry, key)
            if found is None:
                raise
            shutil.rmtree(scratch, ignore_errors=True)
            return found
    except BaseException:
        shutil.rmtree(scratch, ignore_errors=True)
        raise
    return CachedIndex(entry / "index", report, seconds, reused=False, key=key)


def _read_entry(entry: Path, key: str) -> CachedIndex | None:
    meta_file = entry / "build.json"
    if not meta_file.is_file():
        return None
    try:
        meta = json.loads(meta_file.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise IndexStoreError(
            f"evaluation cache entry {entry} is unreadable ({exc}); delete the folder"
        ) from exc
    if meta.get("key") != key:
        raise IndexStoreError(f"evaluation cache entry {entry} holds another key; delete it")
    return CachedIndex(
        entry / "index", _report_from_json(meta["report"]), meta["seconds"], True, key
    )


def _report_from_json(data: dict[str, Any]) -> RefreshReport:
    fields = dict(data)
    fields["skipped"] = [Skipped(s["path"], s["reason"]) for s in data.get("skipped", [])]
    return RefreshReport(**fields)


def _sweep_abandoned(cache_dir: Path, name: str) -> None:
    """Remove half-built folders of this entry whose building process is gone (killed)."""
    for folder in cache_dir.glob(f"{_BUILDING}{name}-*"):
        try:
            pid = int(folder.name[len(_BUILDING) + len(name) + 1 :].split("-", 1)[0])
        except ValueError:
            continue
        if not _alive(pid):
            shutil.rmtree(folder, ignore_errors=True)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # someone else's process
        return True
    return True
