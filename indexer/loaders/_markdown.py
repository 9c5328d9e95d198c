"""Markdown: YAML front matter, heading trails, light inline clean-up."""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

import yaml

from ..documents import Section
from ._common import Parsed, as_tags, json_safe, same_title, tidy_text, title_from_stem

BAD_FRONT_MATTER = "front matter is not valid YAML; ignored"
NOT_A_MAPPING = "front matter is not a YAML mapping; ignored"

# Any indentation: fences nested in list items (runbook steps) are indented further.
_FENCE = re.compile(r"^[ \t]*(?P<fence>`{3,}|~{3,})(?P<info>.*)$")
_ATX = re.compile(r"^ {0,3}(?P<hashes>#{1,6})(?:[ \t]+(?P<text>.*?))?[ \t]*$")
_ATX_CLOSING = re.compile(r"(?:^|[ \t]+)#+$")
_HEADING_ID = re.compile(r"[ \t]*\{#[^}]*\}$")  # Pandoc / MkDocs "## Title {#anchor}"
_SETEXT = re.compile(r"^ {0,3}(?P<line>=+|-+)[ \t]*$")
_THEMATIC_BREAK = re.compile(r"^ {0,3}(?:(?:-[ \t]*){3,}|(?:\*[ \t]*){3,}|(?:_[ \t]*){3,})$")
# Lines that cannot be the text of a setext heading (a "---" under them is a rule).
_NOT_PARAGRAPH = re.compile(r"^(?: {4}|\t| {0,3}(?:[-+*]|\d{1,9}[.)])(?:[ \t]|$)| {0,3}[>|])")
_BLOCKQUOTE = re.compile(r"^ {0,3}(?:> ?)+")
_TABLE_DELIMITER = re.compile(r"^ {0,3}\|?[ \t]*:?-+:?[ \t]*(?:\|[ \t]*:?-+:?[ \t]*)*\|?[ \t]*$")
_LINK_DEFINITION = re.compile(r"^ {0,3}\[(?!\^)[^\]]+\]:[ \t]*\S+.*$")

# Link destination: <...>, or text with at most one level of balanced parentheses,
# then an optional "title". Every repeat is bounded so that lines full of unmatched
# brackets or markers cost linear, not quadratic, time.
_DEST = (
    r"\(\s*(?:<[^>\n]{0,2000}>|(?:[^()\s]|\([^()\s]{0,500}\)){0,2000})"
    r"(?:\s+(?:\"[^\"\n]*\"|'[^'\n]*'|\([^()\n]*\)))?\s*\)"
)
_IMAGE = re.compile(r"!\[([^\]\n]{0,500})\](?:" + _DEST + r"|\[[^\]\n]{0,500}\])")
_LINK = re.compile(r"\[([^\]\n]{0,500})\](?:" + _DEST + r"|\[[^\]\n]{0,500}\])")
_AUTOLINK = re.compile(r"<((?:https?|ftp|mailto):[^>\s]*)>")
_STRONG_STARS = re.compile(r"\*\*(?=\S)(.{1,500}?)(?<=\S)\*\*")
# "__" is emphasis only at word edges, so snake_case and __dunder__ names inside words stay.
_STRONG_UNDERSCORES = re.compile(r"(?<!\w)__(?=\S)(.{1,500}?)(?<=\S)__(?!\w)")
_CODE_SPAN = re.compile(r"(?<!`)(`+)(?!`)(.{1,2000}?)(?<!`)\1(?!`)")


@dataclass(frozen=True)
class _Heading:
    level: int
    text: str


def parse_markdown(text: str, stem: str) -> Parsed:
    """Split Markdown ``text`` into sections under heading trails."""
    parsed = Parsed(title="", sections=[])
    body, front = _split_front_matter(text, parsed.warnings)
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


def _split_front_matter(text: str, warnings: list[str]) -> tuple[str, dict[Any, Any] | None]:
    """The body after any YAML front matter, and the front matter as a dict (or None)."""
    lines = text.split("\n")
    if not lines or lines[0].rstrip() != "---":
        return text, None
    for end in range(1, len(lines)):
        if lines[end].rstrip() in ("---", "..."):
            break
    else:
        return text, None  # no closing line: the "---" is a thematic break
    body = "\n".join(lines[end + 1 :])
    try:
        front = yaml.safe_load("\n".join(lines[1:end]))
    except Exception:  # noqa: BLE001 - YAMLError, but also ValueError for dates like 2024-13-01
        warnings.append(BAD_FRONT_MATTER)
        return body, None
    if front is None:
        return body, {}
    if not isinstance(front, dict):
        warnings.append(NOT_A_MAPPING)
        return body, None
    return body, front


def _tokenise(body: str) -> list[_Heading | str]:
    """Headings and cleaned text lines of a Markdown body, in order.

    Fenced code is kept verbatim without its fences; HTML comments, link
    reference definitions, thematic breaks and table delimiter rows are dropped.
    """
    out: list[_Heading | str] = []
    paragraph = 0  # how many of the last lines in ``out`` form a plain paragraph
    fence: str | None = None
    in_comment = False
    for raw in body.split("\n"):
        if fence is not None:
            stripped = raw.strip()
            if stripped.startswith(fence) and not stripped.strip(fence[0]):
                fence = None
            else:
                out.append(raw)
            continue
        line, in_comment, had_comment = _drop_comments(raw, in_comment)
        if had_comment and not line.strip():
            continue  # a line that was only a comment is not a paragraph break
        m = _FENCE.match(line)
        if m and not (m["fence"][0] == "`" and "`" in m["info"]):
            fence = m["fence"]
            paragraph = 0
            continue
        m = _SETEXT.match(line)
        if m and paragraph:
            # The paragraph above the underline is the heading text.
            words = [str(t).strip() for t in out[-paragraph:]]
            del out[-paragraph:]
            level = 1 if m["line"][0] == "=" else 2
            out.append(_Heading(level, " ".join(words)))
            paragraph = 0
            continue
        m = _ATX.match(line)
        if m:
            out.append(_Heading(len(m["hashes"]), _heading_text(m["text"] or "")))
            paragraph = 0
            continue
        if not line.strip():
            out.append("")
            paragraph = 0
            continue
        if (
            _THEMATIC_BREAK.match(line)
            or _TABLE_DELIMITER.match(line)
            and "|" in line
            or _LINK_DEFINITION.match(line)
        ):
            paragraph = 0
            continue
        paragraph = 0 if _NOT_PARAGRAPH.match(line) else paragraph + 1
        out.append(clean_inline(_BLOCKQUOTE.sub("", line)))
    return out


def _drop_comments(line: str, in_comment: bool) -> tuple[str, bool, bool]:
    """``line`` without HTML comment text; the comment state after it; whether it had any."""
    kept: list[str] = []
    had = in_comment
    while True:
        if in_comment:
            end = line.find("-->")
            if end < 0:
                return "".join(kept), True, True
            line = line[end + 3 :]
            in_comment = False
        start = line.find("<!--")
        if start < 0:
            kept.append(line)
            return "".join(kept), False, had
        kept.append(line[:start])
        line = line[start + 4 :]
        in_comment = had = True


def _heading_text(raw: str) -> str:
    """An ATX heading's text without closing #'s, anchors or inline markup."""
    raw = _ATX_CLOSING.sub("", raw.strip())
    return clean_inline(_HEADING_ID.sub("", raw)).strip()


def clean_inline(line: str) -> str:
    """Links and images to their text, emphasis and code markers removed; code spans verbatim."""
    parts: list[str] = []
    pos = 0
    for m in _CODE_SPAN.finditer(line):
        parts.append(_clean_prose(line[pos : m.start()]))
        code = m[2]
        # CommonMark strips one space each side of a padded code span.
        if len(code) > 2 and code[0] == code[-1] == " " and code.strip():
            code = code[1:-1]
        parts.append(code)
        pos = m.end()
    parts.append(_clean_prose(line[pos:]))
    return "".join(parts)


def _clean_prose(text: str) -> str:
    text = _IMAGE.sub(r"\1", text)
    text = _LINK.sub(r"\1", text)
    text = _AUTOLINK.sub(r"\1", text)
    text = _STRONG_STARS.sub(r"\1", text)
    return _STRONG_UNDERSCORES.sub(r"\1", text)


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
