"""``sounding check``: verify that the files of an index agree, and repair what is derived.

Checks: the manifest reads and names an existing vector file of the right
dimension; every chunk has a vector and every vector a chunk; the FTS5 tables
hold exactly the chunks, each in the table of its document's access class;
every document has chunks; the manifest's counts match; SQLite's own
integrity check passes; no temporary file is left over. Repair rebuilds
derived data (the FAISS file, the FTS5 tables) from the chunk rows (and so
upgrades an index of an older schema), removes leftovers and documents
without chunks (the next ``sounding index`` adds them again), then publishes
a new generation.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .chunking import ChunkSettings
from .errors import IndexMismatchError
from .lock import IndexLock
from .settings import IndexSettings
from .store import (
    DATABASE,
    SCHEMA_VERSION,
    IndexWriter,
    Manifest,
    inspect_database,
    vectors_filename,
)
from .store.modes import loose_modes, tighten_folder
from .vectorfile import read_vector_file
from .vectors import VectorChoice, describe_vectors, index_ids


@dataclass
class CheckReport:
    """What ``sounding check`` found (and, with repair, fixed)."""

    problems: list[str] = field(default_factory=list)
    repaired: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)  # worth knowing, not damage

    @property
    def ok(self) -> bool:
        return not self.problems


def check_index(index_dir: Path) -> CheckReport:
    """Verify the index at ``index_dir``; never changes anything."""
    index_dir = Path(index_dir)
    report = CheckReport()
    loose = loose_modes(index_dir)
    if loose:  # the index holds document text; another local account could read it
        report.problems.append(
            f"readable by other accounts: {', '.join(loose)}; the folder should be 0700 "
            "and its files 0600 (`sounding check --repair` tightens them)"
        )
    try:
        manifest = Manifest.read(index_dir)  # missing or unreadable: raised, said as one line
    except IndexMismatchError:
        old = Manifest.read(index_dir, upgrade=True)  # a schema too old to upgrade: raised
        report.problems.append(
            f"the index has schema version {old.schema_version}; `sounding check --repair` "
            f"upgrades it to {SCHEMA_VERSION} without re-embedding"
        )
        return report
    db_path = index_dir / DATABASE
    if not db_path.is_file():
        report.problems.append(f"{DATABASE} is missing")
        return report
    dim = int(manifest.model["dimension"])
    db = inspect_database(db_path, dim)
    if db.integrity != "ok":
        report.problems.append(f"SQLite integrity check: {db.integrity}")
    chunk_ids, docs = db.chunk_ids, db.documents
    if db.wrong_size_vectors:
        report.problems.append(
            f"{db.wrong_size_vectors} chunk rows hold a vector of the wrong size"
        )
    _compare(report, "lexical (FTS5) index", chunk_ids, db.lexical_ids)
    if db.lexical_misplaced:
        report.problems.append(
            f"{db.lexical_misplaced} lexical rows are in another access class's table than "
            "their document's (its groups)"
        )
    if db.lexical_broken:
        report.problems.append(
            f"lexical tables missing or unreadable: {', '.join(db.lexical_broken)}"
        )
    if db.documents_without_chunks:
        report.problems.append(f"{db.documents_without_chunks} documents have no chunks")
    generation = db.generation if db.generation is not None else manifest.generation
    if generation > manifest.generation:
        report.notes.append(
            f"generation {generation} is committed but the manifest still names "
            f"{manifest.generation} (a publication was interrupted); readers use "
            f"{generation}, and the next `sounding index` updates the manifest"
        )
    elif generation < manifest.generation:
        report.problems.append(
            f"the manifest names generation {manifest.generation}, the database holds {generation}"
        )
    vectors = index_dir / vectors_filename(generation)
    index = read_vector_file(vectors)
    if index is None:
        report.problems.append(
            f"vector file {vectors.name} of generation {generation} is missing or unreadable"
        )
    else:
        if index.d != dim:
            report.problems.append(f"{vectors.name} has {index.d} dimensions, manifest {dim}")
        else:
            _compare(report, f"vector file {vectors.name}", chunk_ids, index_ids(index))
            described = describe_vectors(index)
            if generation == manifest.generation and described["kind"] != manifest.vectors.get(
                "kind"
            ):
                report.problems.append(
                    f"{vectors.name} holds an index of kind {described['kind']}, the manifest says "
                    f"{manifest.vectors.get('kind')}"
                )
    if generation == manifest.generation and (manifest.documents, manifest.chunks) != (
        docs,
        len(chunk_ids),
    ):
        report.problems.append(
            f"manifest counts {manifest.documents} documents and {manifest.chunks} chunks, "
            f"the database holds {docs} and {len(chunk_ids)}"
        )
    leftovers = sorted(p.name for p in index_dir.glob(".*.tmp"))
    leftovers += sorted(
        p.name for p in index_dir.glob("vectors-*.faiss") if p.name != vectors_filename(generation)
    )
    if leftovers:
        report.problems.append(f"files left over by an interrupted run: {', '.join(leftovers)}")
    return report


def _compare(report: CheckReport, what: str, want: np.ndarray, have: np.ndarray) -> None:
    missing = np.setdiff1d(want, have)
    extra = np.setdiff1d(have, want)
    if len(missing):
        report.problems.append(f"{what} lacks {len(missing)} chunks (e.g. id {int(missing[0])})")
    if len(extra):
        report.problems.append(
            f"{what} holds {len(extra)} entries with no chunk (e.g. id {int(extra[0])})"
        )
    if len(have) != len(np.unique(have)):
        report.problems.append(f"{what} lists some chunks twice")


def repair_index(index_dir: Path, vectors: VectorChoice | None = None) -> CheckReport:
    """Check, rebuild what is derived, and check again. Takes the writer lock.

    A vector file rebuilt follows ``vectors`` (default: the ``SOUNDING_``
    settings of the environment), as ``sounding index`` would.
    """
    index_dir = Path(index_dir)
    if vectors is None:
        vectors = IndexSettings().vector_choice
    # Modes first: tightening them needs no rebuild, and the check after it shows the rest.
    tightened = tighten_folder(index_dir) if Path(index_dir).is_dir() else 0
    modes = [f"made {tightened} files and folders owner-only"] if tightened else []
    before = check_index(index_dir)
    if before.ok:
        before.repaired = modes
        return before
    manifest = Manifest.read(index_dir, upgrade=True)  # the writer upgrades an older schema
    chunking = ChunkSettings(manifest.chunking["max_tokens"], manifest.chunking["overlap"])
    with (
        IndexLock(index_dir),
        IndexWriter(index_dir, manifest.model, chunking, vectors=vectors) as writer,
    ):
        done: list[str] = []
        empty = writer.documents_without_chunks()
        if empty:
            writer.remove(empty)
            done.append(
                f"removed {len(empty)} documents without chunks "
                "(the next `sounding index` adds them again)"
            )
        done.append(f"rebuilt the lexical index from {writer.rebuild_lexical()} chunks")
        # Publishing rebuilds the vector file from the chunk rows when it is unusable,
        # and brings a usable one in step; old files and leftovers are removed.
        published = writer.publish()
        done.append(f"published generation {published.generation} with {published.chunks} vectors")
    after = check_index(index_dir)
    after.repaired = modes + done
    return after
