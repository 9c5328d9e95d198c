"""Who may read a document: its groups, from its front matter or from folder rules.

A document with no groups is unrestricted: every caller may read it. A
document with groups may be read only by a caller in at least one of them.
Groups come from, in order of precedence:

1. the document's own ``groups`` (Markdown front matter, an HTML
   ``<meta name="groups">``, a corpus record's ``groups`` field, or a pushed
   document's ``groups``), when it names at least one group;
2. the last matching rule of the rules file (setting ``access_rules``)::

       # Mirror the permissions of the system the documents come from.
       restrict:
         - under: hr/               # document ids (paths in the folder) starting so
           groups: [hr]
         - under: finance/payroll/
           collection: wiki         # optional: only documents of this collection
           groups: [finance, hr]

3. otherwise none: unrestricted.

Invalid groups fail closed: a document whose ``groups`` cannot be read with
certainty (malformed, blank, or under a near-miss key such as ``Groups``) is
skipped with a reason, never indexed as readable by everyone. Rules match ids
and collections after Unicode compatibility normalisation and case folding
(NFKC_Casefold), so ``HR/pay.md`` and a fullwidth ``ｈｒ/pay.md`` fall under
``under: hr/`` too.
"""

from __future__ import annotations

import json
import re
import unicodedata
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .errors import LoadError, SettingsError

GROUP_PATTERN = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")
_GROUP_HELP = "letters, digits, '.', '_' or '-', starting with a letter or digit, at most 64"
_NOT_INDEXED = "the document is not indexed until it is fixed"


def fold(text: str) -> str:
    """``text`` as rules compare it: NFKC, case-folded, NFKC again (Unicode's
    NFKC_Casefold, approximately), so case and compatibility forms cannot slip past."""
    return unicodedata.normalize("NFKC", unicodedata.normalize("NFKC", text).casefold())


def parse_groups(value: Any, where: str) -> tuple[str, ...]:
    """Groups given as a list or a comma-separated string: sorted, unique.

    Raises ValueError naming ``where`` and the bad value when one is not a
    valid group name.
    """
    if value is None:
        return ()
    items = value.split(",") if isinstance(value, str) else value
    if not isinstance(items, list | tuple | set | frozenset):
        raise ValueError(
            f"{where}: groups must be a list or a comma-separated string, "
            f"not {type(value).__name__}"
        )
    out: set[str] = set()
    for item in items:
        name = str(item).strip() if isinstance(item, str | int) else None
        if name is None or not GROUP_PATTERN.match(name):
            raise ValueError(f"{where}: group {item!r} is not a valid group name ({_GROUP_HELP})")
        out.add(name)
    return tuple(sorted(out))


def parse_tags(value: Any) -> tuple[str, ...]:
    """Tags as stored for filtering: stripped, lower-cased, sorted, unique."""
    if value is None:
        return ()
    items = value.split(",") if isinstance(value, str) else value
    if not isinstance(items, list | tuple | set | frozenset):
        items = [items]
    return tuple(sorted({str(t).strip().lower() for t in items if str(t).strip()}))


@dataclass(frozen=True)
class AccessRule:
    """Documents whose id starts with ``under`` (in ``collection``, if set) get ``groups``."""

    under: str
    groups: tuple[str, ...]
    collection: str | None = None
    _under: str = field(init=False, repr=False, compare=False)
    _collection: str | None = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "_under", fold(self.under))
        object.__setattr__(
            self, "_collection", None if self.collection is None else fold(self.collection)
        )

    def matches(self, collection: str, document_id: str) -> bool:
        if self._collection is not None and self._collection != fold(collection):
            return False
        return fold(document_id).startswith(self._under)


@dataclass(frozen=True)
class AccessRules:
    """The folder rules of the configuration, in file order (the last match wins)."""

    rules: tuple[AccessRule, ...] = ()

    @classmethod
    def load(cls, path: Path | None) -> AccessRules:
        """Read a rules file (YAML or JSON); no path means no rules.

        Raises SettingsError naming the file and the bad entry.
        """
        if path is None:
            return cls()
        import yaml

        try:
            data = yaml.safe_load(Path(path).read_text("utf-8"))
        except OSError as exc:
            raise SettingsError(
                f"cannot read access rules {path}: {exc.strerror}; fix the setting access_rules"
            ) from exc
        except yaml.YAMLError as exc:
            raise SettingsError(
                f"access rules {path} are not valid YAML: {' '.join(str(exc).split())}"
            ) from exc
        return cls.from_data(data, str(path))

    @classmethod
    def from_data(cls, data: Any, where: str = "access rules") -> AccessRules:
        """Rules from already parsed data: ``{"restrict": [{under, groups, collection?}]}``."""
        if data is None:
            return cls()
        if not isinstance(data, dict) or set(data) - {"restrict"}:
            raise SettingsError(
                f"{where}: expected a mapping with one key 'restrict' holding a list of rules"
            )
        entries = data.get("restrict") or []
        if not isinstance(entries, list):
            raise SettingsError(f"{where}: 'restrict' must be a list of rules")
        rules: list[AccessRule] = []
        for n, entry in enumerate(entries, 1):
            at = f"{where}, rule {n}"
            if not isinstance(entry, dict) or set(entry) - {"under", "groups", "collection"}:
                raise SettingsError(
                    f"{at}: a rule has the keys under, groups and optionally collection"
                )
            under = entry.get("under")
            if not isinstance(under, str):
                raise SettingsError(
                    f"{at}: 'under' must be a path prefix such as 'hr/' ('' for every document)"
                )
            try:
                groups = parse_groups(entry.get("groups"), at)
            except ValueError as exc:
                raise SettingsError(str(exc)) from exc
            if not groups:
                raise SettingsError(
                    f"{at}: name at least one group; a document no rule "
                    "matches is unrestricted already"
                )
            coll = entry.get("collection")
            if coll is not None and not isinstance(coll, str):
                raise SettingsError(f"{at}: 'collection' must be a collection name")
            rules.append(AccessRule(under.lstrip("/"), groups, coll))
        return cls(tuple(rules))

    def groups_for(
        self, collection: str, document_id: str, metadata: dict[str, Any]
    ) -> tuple[str, ...]:
        """The groups that may read a document; () means unrestricted.

        Raises LoadError when the document's own ``groups`` are invalid, so
        the indexer skips it rather than publish it to everyone.
        """
        own = own_groups(metadata)
        if own:
            return own
        groups: tuple[str, ...] = ()
        for rule in self.rules:
            if rule.matches(collection, document_id):
                groups = rule.groups
        return groups


def own_groups(metadata: dict[str, Any]) -> tuple[str, ...]:
    """The groups a document names itself; LoadError when they cannot be read with
    certainty: malformed, present but blank, or under a near-miss key (``Groups``)."""
    for key in metadata:
        if key != "groups" and fold(str(key)).strip() in ("groups", "group"):
            raise LoadError(
                f"metadata key {key!r} is not read; write it as 'groups'; {_NOT_INDEXED}"
            )
    value = metadata.get("groups")
    if "groups" in metadata and (value is None or isinstance(value, str) and not value.strip()):
        raise LoadError(
            f"'groups' is present but empty; name the groups (or write [] for none); {_NOT_INDEXED}"
        )
    try:
        return parse_groups(value, "front matter")
    except ValueError as exc:
        raise LoadError(f"{exc}; {_NOT_INDEXED}") from exc


def may_read(document_groups: Iterable[str], caller_groups: frozenset[str] | None) -> bool:
    """Whether a caller in ``caller_groups`` may read a document of ``document_groups``.

    ``caller_groups`` None means an unrestricted caller (the CLI, evaluation).
    """
    groups = tuple(document_groups)
    return caller_groups is None or not groups or not caller_groups.isdisjoint(groups)


def dump(values: Iterable[str]) -> str:
    """How groups and tags are stored: a JSON list (SQLite's json_each reads it)."""
    return json.dumps(sorted(values), ensure_ascii=False)
