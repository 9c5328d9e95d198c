"""Markdown: YAML front matter, heading trails, and CommonMark text without its markup."""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

from markdown_it import MarkdownIt
from markdown_it.tree import SyntaxTreeNode

from ..documents import Section
from ..errors import LoadError
from ._common import (
    DEFAULT_MAX_METADATA_BYTES,
    Parsed,
    as_tags,
    json_safe,
    same_title,
    tidy_text,
    title_from_stem,
)
from ._yaml import load_front_matter

NOT_A_MAPPING = (
    "front matter is not a YAML mapping (key: value lines); fix it: the page's access "
    "groups cannot be read with certainty until then"
)
UNCLOSED = (
    "front matter names groups but has no closing '---' line; close it, or the "
    "groups would be indexed as text and the page readable by everyone"
)
# An unclosed block that still names groups was meant as front matter.
_GROUPS_LINE = re.compile(r"^\s*groups?\s*:", re.IGNORECASE)

# CommonMark, plus the GFM tables and strikethrough most wikis render.
_PARSER = MarkdownIt("commonmark").enable(["table", "strikethrough"])
_HEADING_ID = re.compile(r"[ \t]*\{#[^}]*\}$")  # Pandoc / MkDocs "## Title {#anchor}"
_COMMENT = re.compile(r"<!--.*?(?:-->|$)", re.DOTALL)
_SCRIPT = re.compile(r"<(script|style)\b.*?(?:</\1\s*>|$)", re.DOTALL | re.IGNORECASE)
_TAG = re.compile(r"<[^>]*>")
# What lists and tables look like in the text that is shown and embedded: no Markdown
# markers; table cells split by tabs (the page lays such lines out as a table).
BULLET = "• "
CELL = "\t"


@dataclass(frozen=True)
class _Heading:
    level: int
    text: str


def parse_markdown(
    text: str, stem: str, *, max_front_matter_bytes: int = DEFAULT_MAX_METADATA_BYTES
) -> Parsed:
    """Split Markdown ``text`` into sections under heading trails.

    LoadError when the front matter cannot be read with certainty (it may
    hold the page's groups): invalid YAML, not a mapping, aliases, repeated
    keys, unclosed while naming groups, or over ``max_front_matter_bytes``.
    """
    parsed = Parsed(title="", sections=[])
    body, front = _split_front_matter(text, max_front_matter_bytes)
    tokens = _tokenise(body)

    title = ""
    if front is not None:
        title = str(json_safe(front.pop("title", None)) or "").strip()
        if "tags" in front:
            parsed.metadata["tags"] = as_tags(front.pop("tags"))
        parsed.metadata.update({str(k): json_safe(v) for k, v in front.items()})
    h1s = (t for t in tokens if isinstance(t, _Heading) and t.level == 1 and t.text)
    first_h1 = next(h1s, None)
    # The H1 that names the page is the title, not a level of every section's trail.
    title_h1 = None
    if first_h1 is not None and (not title or same_title(first_h1.text, title)):
        title = title or first_h1.text
        title_h1 = first_h1
    parsed.title = title or title_from_stem(stem)
    parsed.sections = _sections(tokens, title_h1)
    return parsed


def _split_front_matter(text: str, max_bytes: int) -> tuple[str, dict[Any, Any] | None]:
    """The body after any YAML front matter, and the front matter as a dict (or None)."""
    lines = text.split("\n")
    if not lines or lines[0].rstrip() != "---":
        return text, None
    for end in range(1, len(lines)):
        if lines[end].rstrip() in ("---", "..."):
            break
    else:
        # No closing line: the "---" is a thematic break, unless groups follow it.
        if any(_GROUPS_LINE.match(line) for line in lines[1:50]):
            raise LoadError(UNCLOSED)
        return text, None
    body = "\n".join(lines[end + 1 :])
    source = "\n".join(lines[1:end])
    size = len(source.encode("utf-8"))
    if size > max_bytes:  # refused before parsing: YAML costs far more than its bytes
        raise LoadError(
            f"front matter is {size} bytes, over the limit of {max_bytes} "
            "(setting max_metadata_bytes)"
        )
    front = load_front_matter(source)
    if front is None:
        return body, {}
    if isinstance(front, str) and not re.search("group", front, re.IGNORECASE):
        return text, None  # prose between two thematic breaks, not front matter
    if not isinstance(front, dict):
        raise LoadError(NOT_A_MAPPING)
    return body, front


def _tokenise(body: str) -> list[_Heading | str]:
    """Headings and text blocks of a Markdown body, in order, as a reader sees them.

    The body is parsed as CommonMark (markdown-it-py); blocks are paragraphs,
    lists, tables, quotes and code, with every markup character gone: emphasis,
    links and images become their text, list items start with a bullet or their
    number, table cells are split by tabs, code is kept verbatim without fences.
    HTML comments and tags are dropped; thematic breaks only end a block.
    """
    out: list[_Heading | str] = []
    for node in SyntaxTreeNode(_PARSER.parse(body)).children:
        if node.type == "heading":
            text = _HEADING_ID.sub("", _inline(node)).strip()
            out.append(_Heading(int(node.tag[1:]), text))
            continue
        text = _block(node)
        if text.strip():
            out += [text, ""]
    return out


def _block(node: SyntaxTreeNode) -> str:
    """The text of one block node (and of the blocks inside it)."""
    kind = node.type
    if kind in ("paragraph", "heading"):
        return _inline(node)
    if kind in ("fence", "code_block"):
        return node.content.rstrip("\n")
    if kind == "html_block":
        return _html_text(node.content)
    if kind == "hr":
        return ""
    if kind in ("bullet_list", "ordered_list"):
        return _list(node)
    if kind == "table":
        return _table(node)
    # Block quotes and any other container: their blocks, a blank line apart.
    return "\n\n".join(t for t in (_block(c) for c in node.children) if t.strip())


def _list(node: SyntaxTreeNode) -> str:
    """A list, one item a line: ``• text`` or ``3. text``; nested items indented."""
    ordered = node.type == "ordered_list"
    start = int(str(node.attrs.get("start", 1))) if ordered else 1
    lines: list[str] = []
    for offset, item in enumerate(node.children):
        marker = f"{start + offset}{item.markup or '.'} " if ordered else BULLET
        body = "\n".join(t for t in (_block(c) for c in item.children) if t.strip())
        first, *rest = body.split("\n")
        pad = " " * len(marker)
        lines.append(marker + first)
        lines += [pad + line if line.strip() else "" for line in rest]
    return "\n".join(lines)


def _table(node: SyntaxTreeNode) -> str:
    """A table, one row a line, cells split by tabs (header row first)."""
    rows: list[str] = []
    for part in node.children:  # thead, tbody
        for row in part.children:
            cells = (" ".join(_inline(cell).split()) for cell in row.children)
            rows.append(CELL.join(cells))
    return "\n".join(rows)


def _inline(node: SyntaxTreeNode) -> str:
    """The text of inline content: markers dropped, links and images as their text."""
    kind = node.type
    if kind in ("text", "code_inline"):
        return node.content
    if kind == "softbreak":
        return " "
    if kind == "hardbreak":
        return "\n"
    if kind == "html_inline":
        return ""  # a tag or a comment: never text a reader sees
    # inline, paragraph, heading, cells, emphasis, strong, strikethrough, links, images
    return "".join(_inline(c) for c in node.children)


def _html_text(html: str) -> str:
    """The text of a raw HTML block: comments, scripts, styles and tags dropped."""
    text = _TAG.sub("", _SCRIPT.sub("", _COMMENT.sub("", html)))
    return tidy_text("\n".join(line.strip() for line in text.split("\n")))


def _sections(tokens: list[_Heading | str], title_h1: _Heading | None) -> list[Section]:
    """Group text lines under their heading trails; drop sections without text."""
    sections: list[Section] = []
    stack: list[tuple[int, str]] = []
    lines: list[str] = []

    def flush() -> None:
        text = tidy_text("\n".join(lines))
        if text.strip():
            sections.append(Section(trail=tuple(t for _, t in stack if t), text=text))
        lines.clear()

    for token in tokens:
        if isinstance(token, _Heading):
            flush()
            while stack and stack[-1][0] >= token.level:
                stack.pop()
            # The title heading still closes deeper levels but adds nothing to trails.
            stack.append((token.level, "" if token is title_h1 else token.text))
        else:
            lines.append(token)
    flush()
    return sections
