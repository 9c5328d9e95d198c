"""Who may push or delete a document: decided for the caller's readable groups.

A writer may change only documents it may read, and may not push one it could
not read afterwards (it could then neither update nor delete it). The stored
document's groups are read under the index lock, in the writer's transaction,
so a re-index that restricts a page while a push waits is honoured.
"""

from __future__ import annotations

from collections.abc import Sequence

from .access import may_read
from .errors import AccessError


class HiddenDocumentError(AccessError):
    """The id holds a document the caller may not read; told as if it did not exist."""


def check_writable(groups: Sequence[str], caller_groups: frozenset[str] | None) -> None:
    """AccessError unless a caller in ``caller_groups`` (None: unrestricted) could read
    a document restricted to ``groups``.

    Decided from the request alone, never from the index, so the refusal is the
    same whether or not a hidden document holds the id.
    """
    if may_read(groups, caller_groups):
        return
    mine = ", ".join(sorted(caller_groups or ())) or "none"
    raise AccessError(
        f"groups: this key could not read a document restricted to {', '.join(sorted(groups))} "
        f"(the key's groups: {mine}), so it could not update or delete it afterwards; push it "
        "with groups that include one of the key's, or with a key of those groups"
    )


def check_visible(
    document_id: str,
    stored_groups: Sequence[str] | None,
    caller_groups: frozenset[str] | None,
) -> None:
    """HiddenDocumentError when a stored document (``stored_groups`` not None) is hidden
    from the caller; the message is the one an unknown id gets."""
    if stored_groups is not None and not may_read(stored_groups, caller_groups):
        raise HiddenDocumentError(f"no document with id {document_id!r} in the index")
