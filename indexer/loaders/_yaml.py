"""YAML front matter read strictly: what cannot be read with certainty is an error.

Front matter may carry a page's ``groups``; a reading that guesses (PyYAML
keeps the last of two equal keys) or that can explode (aliases expand a few
hundred bytes into tens of MB, and a self-referencing one never ends) could
publish a restricted page or exhaust the service. So anchors, aliases,
repeated keys and deep nesting are refused, and every YAML error becomes a
LoadError: the document is skipped (or a push refused) with the reason.
"""

from __future__ import annotations

from typing import Any

import yaml

from ..errors import LoadError

# Real front matter nests two or three levels; the composer recurses per level.
MAX_DEPTH = 20
_FIX = "fix it: the page's access groups cannot be read with certainty until then"


class _StrictLoader(yaml.SafeLoader):
    """SafeLoader without anchors, aliases or repeated keys, nesting at most MAX_DEPTH."""

    _depth = 0

    def compose_node(self, parent: yaml.Node | None, index: Any) -> yaml.Node | None:
        event = self.peek_event()  # type: ignore[no-untyped-call]
        if isinstance(event, yaml.AliasEvent) or getattr(event, "anchor", None) is not None:
            raise _refused("uses a YAML anchor or alias (&name or *name)", event)
        self._depth += 1
        try:
            if self._depth > MAX_DEPTH:
                raise _refused(f"nests deeper than {MAX_DEPTH} levels", event)
            return super().compose_node(parent, index)
        finally:
            self._depth -= 1

    def compose_mapping_node(self, anchor: Any) -> yaml.MappingNode:
        node: yaml.MappingNode = super().compose_mapping_node(anchor)
        seen: set[str] = set()
        for key, _ in node.value:
            if isinstance(key, yaml.ScalarNode):
                if key.value in seen:
                    raise _refused(f"repeats the key {key.value!r}", key)
                seen.add(key.value)
        return node

    def construct_yaml_timestamp(self, node: yaml.ScalarNode) -> Any:
        # An impossible date (2024-13-45) is text, not a reason to lose the page.
        try:
            return super().construct_yaml_timestamp(node)
        except ValueError:
            return self.construct_scalar(node)


_StrictLoader.add_constructor(
    "tag:yaml.org,2002:timestamp",
    _StrictLoader.construct_yaml_timestamp,
)


def _line(mark: Any) -> str:
    # Marks count from the line after the opening "---", 0-based: +2 is the file's line.
    return f" (line {mark.line + 2})" if mark is not None else ""


def _refused(what: str, at: Any) -> LoadError:
    return LoadError(f"front matter {what}{_line(getattr(at, 'start_mark', None))}; {_FIX}")


def load_front_matter(text: str) -> Any:
    """The front matter ``text`` as Python values; LoadError with the reason when it
    is not valid YAML or uses what :class:`_StrictLoader` refuses."""
    loader = _StrictLoader(text)
    try:
        return loader.get_single_data()
    except LoadError:
        raise
    except yaml.MarkedYAMLError as exc:
        problem = " ".join(str(exc.problem or exc.context or "syntax error").split())
        raise LoadError(
            f"front matter is not valid YAML: {problem}{_line(exc.problem_mark)}; {_FIX}"
        ) from None
    except (yaml.YAMLError, ValueError, RecursionError) as exc:
        detail = " ".join(str(exc).split())[:200] or type(exc).__name__
        raise LoadError(f"front matter is not valid YAML: {detail}; {_FIX}") from None
    finally:
        loader.dispose()
