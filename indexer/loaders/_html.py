"""HTML: main-content text with heading trails, using only the stdlib parser."""

from __future__ import annotations

import re
from dataclasses import dataclass
from html.parser import HTMLParser
from typing import Any

from ..documents import Section
from ..errors import LoadError
from ._common import Parsed, as_tags, same_title, tidy_text, title_from_stem

NO_MARKUP = "not HTML: no markup found"
_FIX = "fix it: the page's access groups cannot be read with certainty until then"
GROUPS_META_NAME = f'<meta name="group"> is not read; did you mean name="groups"? {_FIX}'
GROUPS_META_EMPTY = f'<meta name="groups"> has no content; name the groups or remove it; {_FIX}'
GROUPS_META_TWICE = f'the page has two <meta name="groups"> with different content; {_FIX}'

# Elements whose content is never page text (chrome, code, embedded objects).
DROPPED = frozenset(
    {
        "script",
        "style",
        "noscript",
        "template",
        "svg",
        "nav",
        "header",
        "footer",
        "aside",
        "form",
        "iframe",
    }
)
# A <header>/<footer> inside these is the article's own (title, byline), not site chrome.
CONTENT_ROOTS = frozenset({"main", "article"})
VOID = frozenset(
    {
        "area",
        "base",
        "br",
        "col",
        "embed",
        "hr",
        "img",
        "input",
        "link",
        "meta",
        "param",
        "source",
        "track",
        "wbr",
    }
)
HEADINGS = {f"h{n}": n for n in range(1, 7)}
# Blocks that end a paragraph (blank line) versus those that only end a line.
PARAGRAPH_BLOCKS = frozenset(
    {
        "p",
        "pre",
        "blockquote",
        "table",
        "ul",
        "ol",
        "dl",
        "section",
        "article",
        "main",
        "figure",
        "details",
        "hr",
    }
) | frozenset(HEADINGS)
LINE_BLOCKS = frozenset(
    {
        "div",
        "li",
        "tr",
        "dd",
        "dt",
        "br",
        "address",
        "caption",
        "figcaption",
        "summary",
        "fieldset",
        "body",
        "html",
        "center",
    }
)
_SPACES = re.compile(r"\s+")
_ANY_TAG = re.compile(r"<[a-zA-Z!/?]")
_DISPLAY_NONE = re.compile(r"display\s*:\s*none", re.IGNORECASE)
_META_CHARSET = re.compile(rb"<meta[^>]+charset\s*=\s*[\"']?([A-Za-z0-9._:-]+)", re.IGNORECASE)


def declared_charset(data: bytes) -> str | None:
    """The charset an HTML file declares in a ``<meta>`` near its start, if any."""
    m = _META_CHARSET.search(data[:4096])
    return m[1].decode("ascii") if m else None


@dataclass
class _Frame:
    tag: str
    dropped: bool = False  # this element starts a dropped subtree
    live: bool = False  # opened outside any dropped subtree, so closing it has effects
    main: bool = False  # the first <main>/<article>
    content: bool = False  # any <main>/<article>


# An event: (kind, value, inside the first <main>/<article>).
_Event = tuple[str, Any, bool]


class _Extractor(HTMLParser):
    """Collects text, breaks and headings as events; the caller assembles sections."""

    def __init__(self, drop: frozenset[str]) -> None:
        super().__init__(convert_charrefs=True)
        self.drop = drop
        self.events: list[_Event] = []
        self.meta: dict[str, Any] = {}
        self.title: str | None = None
        self.main_seen = False
        self._stack: list[_Frame] = []
        self._dropping = 0
        self._in_main = False
        self._content_depth = 0
        self._title_parts: list[str] | None = None
        self._heading: tuple[int, list[str]] | None = None
        self._pre = 0
        self._cells = 0
        self._rows: list[int] = []

    # -- parser callbacks -------------------------------------------------
    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        attr = {k: (v or "") for k, v in attrs}
        if tag == "meta":
            self._meta(attr)
            return
        if tag in VOID:
            if not self._dropping and tag in ("br", "hr"):
                self._break("\n" if tag == "br" else "\n\n")
            return
        if tag in HEADINGS and self._heading is not None:
            self._end_heading()  # an unclosed heading ends where the next begins
        frame = _Frame(tag, dropped=self._drops(tag, attr), live=not self._dropping)
        self._stack.append(frame)
        if frame.dropped:
            self._dropping += 1
        if self._dropping:
            return
        if tag in CONTENT_ROOTS:
            frame.content = True
            self._content_depth += 1
            if not self.main_seen:
                frame.main = self.main_seen = self._in_main = True
        if tag == "title" and self.title is None:
            self._title_parts = []
        elif tag in HEADINGS:
            self._heading = (HEADINGS[tag], [])
        elif tag == "pre":
            self._pre += 1
        elif tag == "tr":
            self._rows.append(0)
        elif tag in ("td", "th"):
            if self._rows:
                if self._rows[-1]:
                    self._emit("cell", " | ")
                self._rows[-1] += 1
            self._cells += 1
        self._block(tag)

    def handle_startendtag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        # <div/> and friends: an element that opens and closes at once.
        self.handle_starttag(tag, attrs)
        if tag not in VOID:
            self.handle_endtag(tag)

    def handle_endtag(self, tag: str) -> None:
        for i in range(len(self._stack) - 1, -1, -1):
            open_tag = self._stack[i].tag
            # Browsers let any </hN> close whichever heading is open.
            if open_tag == tag or (tag in HEADINGS and open_tag in HEADINGS):
                break
        else:
            if tag in ("br", "p") and not self._dropping:  # browsers read </br>, </p> as breaks
                self._break("\n" if tag == "br" else "\n\n")
            return
        # Closing an element also closes everything left open inside it.
        while len(self._stack) > i:
            self._close(self._stack.pop())

    def handle_data(self, data: str) -> None:
        if self._dropping:
            return
        if self._title_parts is not None:
            self._title_parts.append(data)
        elif self._heading is not None:
            self._heading[1].append(data)
        else:
            self._emit("pre" if self._pre else "text", data)

    def close(self) -> None:
        super().close()
        while self._stack:
            self._close(self._stack.pop())

    # -- helpers -------------------------------------------------------------
    def _drops(self, tag: str, attr: dict[str, str]) -> bool:
        if tag in ("header", "footer") and self._content_depth:
            return False
        return (
            tag in self.drop
            or "hidden" in attr
            or attr.get("aria-hidden", "").strip().lower() == "true"
            or attr.get("role", "").strip().lower() == "navigation"
            or bool(_DISPLAY_NONE.search(attr.get("style", "")))
        )

    def _close(self, frame: _Frame) -> None:
        # Only elements opened outside dropped subtrees had start effects to undo.
        if frame.live and not frame.dropped:
            tag = frame.tag
            if tag in HEADINGS and self._heading is not None:
                self._end_heading()
            elif tag == "title" and self._title_parts is not None:
                self.title = _SPACES.sub(" ", "".join(self._title_parts)).strip()
                self._title_parts = None
            elif tag == "pre":
                self._pre -= 1
            elif tag == "tr" and self._rows:
                self._rows.pop()
            elif tag in ("td", "th"):
                self._cells -= 1
            if frame.content:
                self._content_depth -= 1
            self._block(tag)
            if frame.main:
                self._in_main = False
        if frame.dropped:
            self._dropping -= 1

    def _meta(self, attr: dict[str, str]) -> None:
        name = attr.get("name", "").strip().lower()
        content = attr.get("content", "").strip()
        if name in ("groups", "group"):
            self._groups_meta(name, content)
            return
        if not content or name not in ("keywords", "description", "author"):
            return
        key = "tags" if name == "keywords" else name
        if key not in self.meta:
            self.meta[key] = as_tags(content) if key == "tags" else _SPACES.sub(" ", content)

    def _groups_meta(self, name: str, content: str) -> None:
        """Keep the page's groups; refuse what cannot be read with certainty (the page
        might be restricted), so it is skipped rather than readable by everyone."""
        if name != "groups":
            raise LoadError(GROUPS_META_NAME)
        if not content:
            raise LoadError(GROUPS_META_EMPTY)
        content = _SPACES.sub(" ", content)
        if self.meta.get("groups", content) != content:
            raise LoadError(GROUPS_META_TWICE)
        # groups stay a string: indexer.access validates them (and fails closed).
        self.meta["groups"] = content

    def _block(self, tag: str) -> None:
        if tag in PARAGRAPH_BLOCKS:
            self._break("\n\n")
        elif tag in LINE_BLOCKS:
            self._break("\n")

    def _break(self, kind: str) -> None:
        if self._heading is not None:
            self._heading[1].append(" ")
        elif self._cells:
            self._emit("text", " ")  # a cell's paragraphs stay on the row's line
        else:
            self._emit("break", kind)

    def _end_heading(self) -> None:
        assert self._heading is not None
        level, parts = self._heading
        self._heading = None
        self._emit("heading", (level, _SPACES.sub(" ", "".join(parts)).strip()))

    def _emit(self, kind: str, value: Any) -> None:
        self.events.append((kind, value, self._in_main))


def parse_html(text: str, stem: str) -> Parsed:
    """Extract the readable text of an HTML page as sections under heading trails."""
    if not _ANY_TAG.search(text):
        raise LoadError(NO_MARKUP)
    ex = _extract(text, DROPPED)
    events = _content_events(ex)
    if not _has_text(events):
        # Some portals (ASP.NET, SharePoint) wrap the whole page in one <form>.
        ex = _extract(text, DROPPED - {"form"})
        events = _content_events(ex)
    headings = [value for kind, value, _ in events if kind == "heading" and value[1]]
    first_h1 = next((t for level, t in headings if level == 1), None)
    title = ex.title or first_h1 or title_from_stem(stem)
    return Parsed(title=title, sections=_sections(events, title), metadata=dict(ex.meta))


def _extract(text: str, drop: frozenset[str]) -> _Extractor:
    ex = _Extractor(drop)
    ex.feed(text)
    ex.close()
    return ex


def _content_events(ex: _Extractor) -> list[_Event]:
    """The events of the first <main>/<article> if it has text, else of the whole page."""
    if ex.main_seen:
        inside = [e for e in ex.events if e[2]]
        if _has_text(inside):
            return inside
    return ex.events


def _has_text(events: list[_Event]) -> bool:
    return any(kind in ("text", "pre") and value.strip() for kind, value, _ in events)


def _sections(events: list[_Event], title: str) -> list[Section]:
    """Assemble events into sections; an h1 repeating the title is left out of trails."""
    sections: list[Section] = []
    stack: list[tuple[int, str]] = []
    pieces: list[str] = []
    title_h1_done = False

    def flush() -> None:
        body = tidy_text("".join(pieces))
        if body.strip():
            sections.append(Section(trail=tuple(t for _, t in stack if t), text=body))
        pieces.clear()

    def at_gap() -> bool:
        return not pieces or pieces[-1][-1] in " \n"

    for kind, value, _ in events:
        if kind == "heading":
            flush()
            level, heading = value
            while stack and stack[-1][0] >= level:
                stack.pop()
            if level == 1 and not title_h1_done and same_title(heading, title):
                title_h1_done = True
                heading = ""
            stack.append((level, heading))
        elif kind == "text":
            chunk = _SPACES.sub(" ", value)
            if at_gap():
                chunk = chunk.lstrip(" ")
            if chunk:
                pieces.append(chunk)
        elif kind == "pre":
            if value:
                pieces.append(value)
        elif kind == "cell":
            if pieces and pieces[-1].endswith(" "):
                pieces[-1] = pieces[-1].rstrip(" ")
            pieces.append(value)
        elif pieces:  # a break: merge with the newlines already there (</tr><tr> is one)
            have = len(pieces[-1]) - len(pieces[-1].rstrip("\n"))
            if len(value) > have:
                pieces.append("\n" * (len(value) - have))
    flush()
    return sections
