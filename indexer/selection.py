"""Which documents a search may see: the caller's groups plus the user's filters.

:class:`SearchFilter` turns into one SQL condition over the ``documents``
table (alias ``d``), so the dense search (as a FAISS id selector), the
lexical search (inside its FTS5 query) and every document lookup apply the
same rule, and all of them apply it before the top-k cut.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from .access import may_read


@dataclass(frozen=True)
class SearchFilter:
    """Restrictions on the documents a search may return.

    ``groups`` None means an unrestricted caller (the CLI, evaluation);
    a set (possibly empty) means a caller who may read unrestricted
    documents and those of these groups. ``collections`` and ``tags`` match
    any of their values; ``modified_after`` is Unix seconds (exclusive);
    ``source_prefix`` matches the start of the document's source path or of
    its id (its path inside the indexed folder).
    """

    groups: frozenset[str] | None = None
    collections: tuple[str, ...] = ()
    tags: tuple[str, ...] = ()
    modified_after: float | None = None
    source_prefix: str | None = None
    _key: tuple[Any, ...] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        # Normalised once, so equal filters share one cache entry.
        groups = None if self.groups is None else frozenset(self.groups)
        object.__setattr__(self, "groups", groups)
        object.__setattr__(self, "collections", tuple(sorted(set(self.collections))))
        object.__setattr__(self, "tags", tuple(sorted({t.lower() for t in self.tags})))
        object.__setattr__(
            self,
            "_key",
            (
                None if groups is None else tuple(sorted(groups)),
                self.collections,
                self.tags,
                self.modified_after,
                self.source_prefix or None,
            ),
        )

    @property
    def key(self) -> tuple[Any, ...]:
        """A hashable identity of the filter (for caches)."""
        return self._key

    @property
    def narrows(self) -> bool:
        """Whether anything besides access is restricted."""
        return bool(
            self.collections or self.tags or self.modified_after is not None or self.source_prefix
        )

    def sql(self) -> tuple[str, list[Any]]:
        """A condition over ``documents d`` and its parameters ("1" when it allows all)."""
        parts: list[str] = []
        params: list[Any] = []
        if self.groups is not None:
            if self.groups:
                marks = ",".join("?" * len(self.groups))
                parts.append(
                    f"(d.groups = '[]' OR EXISTS (SELECT 1 FROM json_each(d.groups) "
                    f"WHERE value IN ({marks})))"
                )
                params += sorted(self.groups)
            else:
                parts.append("d.groups = '[]'")
        if self.collections:
            parts.append(f"d.collection IN ({','.join('?' * len(self.collections))})")
            params += list(self.collections)
        if self.tags:
            marks = ",".join("?" * len(self.tags))
            parts.append(f"EXISTS (SELECT 1 FROM json_each(d.tags) WHERE value IN ({marks}))")
            params += list(self.tags)
        if self.modified_after is not None:
            parts.append("d.modified > ?")
            params.append(float(self.modified_after))
        if self.source_prefix:
            # substr, not LIKE: LIKE ignores ASCII case, and the prefix must match exactly.
            n, prefix = len(self.source_prefix), self.source_prefix
            parts.append("(substr(d.source, 1, ?) = ? OR substr(d.id, 1, ?) = ?)")
            params += [n, prefix, n, prefix]
        return (" AND ".join(parts) or "1"), params

    def admits(self, doc: Any) -> bool:
        """The same rule in Python, for one document record (a second check on results)."""
        if not may_read(doc.groups, self.groups):
            return False
        if self.collections and doc.collection not in self.collections:
            return False
        if self.tags and not set(self.tags) & set(doc.tags):
            return False
        if self.modified_after is not None and not doc.modified > self.modified_after:
            return False
        prefix = self.source_prefix
        return not prefix or doc.source.startswith(prefix) or doc.id.startswith(prefix)


EVERYTHING = SearchFilter()
