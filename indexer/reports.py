"""What an indexing run and a pushed change did: counts, skipped files, warnings."""

from __future__ import annotations

from dataclasses import dataclass, field

from .documents import Document, Skipped


@dataclass(frozen=True)
class DocumentWarning:
    """Something a person should know about a document that was indexed anyway."""

    path: str
    warning: str


def warnings_of(doc: Document) -> list[str]:
    """The warnings the loaders left in a document's metadata."""
    found = doc.metadata.get("warnings") or []
    return [str(w) for w in found] if isinstance(found, list) else [str(found)]


# Lines per kind (added, updated, removed, skipped) in the plain report; --json has all.
LIST_LIMIT = 20


def _capped(lines: list[str], kind: str, limit: int) -> list[str]:
    if len(lines) <= limit:
        return lines
    return [*lines[:limit], f"... and {len(lines) - limit} more {kind} (--json lists all)"]


@dataclass
class RefreshReport:
    """What one ``sounding index`` run did."""

    added: list[str] = field(default_factory=list)
    updated: list[str] = field(default_factory=list)
    removed: list[str] = field(default_factory=list)
    unchanged: int = 0
    skipped: list[Skipped] = field(default_factory=list)
    warnings: list[DocumentWarning] = field(default_factory=list)
    chunks_embedded: int = 0
    chunks_reused: int = 0
    generation: int = 0
    documents: int = 0
    chunks: int = 0
    seconds: float = 0.0
    stopped_early: bool = False  # max_runtime reached; the rest waits for the next run
    pending_left: int = 0
    lock_taken_over: bool = False  # the previous run died holding the lock
    published: bool = True  # False: nothing changed, so the last generation stands

    def warn(self, doc: Document) -> None:
        """Record the warnings of a document the run indexed (or found unchanged)."""
        self.warnings += [DocumentWarning(doc.id, w) for w in warnings_of(doc)]

    def summary(self) -> str:
        """One line of counts (also the last-run record, which names no document)."""
        tail = ""
        if self.stopped_early:
            tail = (
                f"; stopped at the time limit with {self.pending_left} documents left "
                "for the next run"
            )
        warned = f", {len(self.warnings)} warnings" if self.warnings else ""
        return (
            f"added {len(self.added)}, updated {len(self.updated)}, removed {len(self.removed)}, "
            f"unchanged {self.unchanged}, skipped {len(self.skipped)}{warned}; "
            f"index now holds {self.documents} documents in {self.chunks} chunks "
            f"(generation {self.generation}{'' if self.published else ' kept: nothing changed'}, "
            f"{self.chunks_embedded} chunks embedded, "
            f"{self.chunks_reused} reused, {self.seconds:.1f} s){tail}"
        )

    def text(self, limit: int = LIST_LIMIT) -> str:
        """The plain-text report ``sounding index`` prints: the counts, then a line per
        added, updated, removed and skipped document (at most ``limit`` of each, then how
        many more) and per warning about an indexed document."""
        lines = [self.summary()]
        for action, ids in (("added", self.added), ("updated", self.updated)):
            lines += _capped([f"{action} {i}" for i in ids], action, limit)
        lines += _capped([f"removed {i}" for i in self.removed], "removed", limit)
        lines += _capped([f"skipped {s.path}: {s.reason}" for s in self.skipped], "skipped", limit)
        lines += [f"warning {w.path}: {w.warning}" for w in self.warnings]
        return "\n".join(lines)

    def to_json(self) -> dict[str, object]:
        return {
            "added": self.added,
            "updated": self.updated,
            "removed": self.removed,
            "unchanged": self.unchanged,
            "skipped": [{"path": s.path, "reason": s.reason} for s in self.skipped],
            "warnings": [{"path": w.path, "warning": w.warning} for w in self.warnings],
            "chunks_embedded": self.chunks_embedded,
            "chunks_reused": self.chunks_reused,
            "generation": self.generation,
            "documents": self.documents,
            "chunks": self.chunks,
            "seconds": round(self.seconds, 3),
            "stopped_early": self.stopped_early,
            "pending_left": self.pending_left,
            "lock_taken_over": self.lock_taken_over,
            "published": self.published,
        }


@dataclass
class PushReport:
    """What one pushed change did."""

    document_id: str
    action: str  # "added", "updated", "unchanged" or "removed"
    chunks: int = 0
    chunks_embedded: int = 0
    generation: int = 0
