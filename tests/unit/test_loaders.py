"""Unit tests of indexer.loaders: every format, the walk rules and the skip reasons."""

from __future__ import annotations

import gzip
import hashlib
import io
import json
import os
import sys
import time
from pathlib import Path

import pypdf
import pytest
import sounding.indexer.loaders as loaders
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sounding.indexer.documents import Document, Section, Skipped
from sounding.indexer.errors import LoadError, SettingsError
from sounding.indexer.loaders import SUPPORTED_SUFFIXES, iter_root, load_file

# -- helpers -------------------------------------------------------------------


def write(root: Path, rel: str, content: str | bytes) -> Path:
    """Create ``root/rel`` (and its folders) holding ``content``; UTF-8 for str."""
    path = root / rel
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(content.encode("utf-8") if isinstance(content, str) else content)
    return path


def walk(root: Path, **kwargs: int) -> tuple[dict[str, Document], dict[str, str]]:
    """Documents by id and skip reasons by path from one ``iter_root`` run."""
    docs: dict[str, Document] = {}
    skipped: dict[str, str] = {}
    for item in iter_root(root, **kwargs):
        if isinstance(item, Skipped):
            skipped[item.path] = item.reason
        else:
            assert item.id not in docs, f"duplicate id {item.id}"
            docs[item.id] = item
    return docs, skipped


def load_one(tmp_path: Path, name: str, content: str | bytes) -> Document:
    """Write one file and load it through ``load_file``; exactly one document expected."""
    docs = load_file(write(tmp_path, name, content), name)
    assert len(docs) == 1
    return docs[0]


def skip_reason(tmp_path: Path, name: str, content: str | bytes) -> str:
    """The reason ``iter_root`` gives for skipping a lone file."""
    write(tmp_path / "root", name, content)
    docs, skipped = walk(tmp_path / "root")
    assert not docs, f"expected {name} to be skipped, got {list(docs)}"
    assert list(skipped) == [name]
    return skipped[name]


def texts(doc: Document) -> list[tuple[tuple[str, ...], str]]:
    return [(s.trail, s.text) for s in doc.sections]


def _pdf_string(text: str) -> str:
    return "(" + text.replace("\\", "\\\\").replace("(", "\\(").replace(")", "\\)") + ")"


def make_pdf(
    pages: list[list[str]], *, title: str | None = None, author: str | None = None
) -> bytes:
    """A minimal valid PDF, written by hand: one Helvetica text line per string.

    An empty list gives a page with a drawing but no text (a scanned page).
    """
    objects: list[bytes] = []

    def add(body: bytes) -> int:
        objects.append(body)
        return len(objects)

    catalog, pages_ref = add(b""), add(b"")
    font = add(b"<< /Type /Font /Subtype /Type1 /BaseFont /Helvetica >>")
    kids = []
    for lines in pages:
        ops = ["BT", "/F1 12 Tf", "72 720 Td"]
        for i, line in enumerate(lines):
            ops += (["0 -16 Td"] if i else []) + [f"{_pdf_string(line)} Tj"]
        stream = "\n".join([*ops, "ET"]).encode("latin-1") if lines else b"0 0 m 10 10 l S"
        content = add(b"<< /Length %d >>\nstream\n%s\nendstream" % (len(stream), stream))
        kids.append(
            add(
                f"<< /Type /Page /Parent {pages_ref} 0 R /MediaBox [0 0 612 792] "
                f"/Resources << /Font << /F1 {font} 0 R >> >> /Contents {content} 0 R >>".encode()
            )
        )
    objects[catalog - 1] = f"<< /Type /Catalog /Pages {pages_ref} 0 R >>".encode()
    kid_refs = " ".join(f"{k} 0 R" for k in kids)
    objects[pages_ref - 1] = f"<< /Type /Pages /Kids [{kid_refs}] /Count {len(kids)} >>".encode()
    info = None
    if title is not None or author is not None:
        entries = [f"/Title {_pdf_string(title)}" if title is not None else ""]
        entries.append(f"/Author {_pdf_string(author)}" if author is not None else "")
        info = add(("<< " + " ".join(entries) + " >>").encode("latin-1"))

    out = io.BytesIO()
    out.write(b"%PDF-1.4\n")
    offsets = []
    for number, body in enumerate(objects, start=1):
        offsets.append(out.tell())
        out.write(b"%d 0 obj\n%s\nendobj\n" % (number, body))
    xref = out.tell()
    out.write(b"xref\n0 %d\n0000000000 65535 f \n" % (len(objects) + 1))
    for offset in offsets:
        out.write(b"%010d 00000 n \n" % offset)
    info_ref = f" /Info {info} 0 R" if info else ""
    out.write(f"trailer\n<< /Size {len(objects) + 1} /Root {catalog} 0 R{info_ref} >>\n".encode())
    out.write(b"startxref\n%d\n%%%%EOF\n" % xref)
    return out.getvalue()


def encrypt_pdf(data: bytes, user: str, owner: str | None = None) -> bytes:
    writer = pypdf.PdfWriter(clone_from=pypdf.PdfReader(io.BytesIO(data)))
    writer.encrypt(user, owner_password=owner)
    out = io.BytesIO()
    writer.write(out)
    return out.getvalue()


def test_make_pdf_helper_builds_a_readable_pdf() -> None:
    reader = pypdf.PdfReader(io.BytesIO(make_pdf([["Hello (world)"], []], title="T")))
    assert len(reader.pages) == 2
    assert reader.pages[0].extract_text() == "Hello (world)"
    assert reader.metadata is not None and reader.metadata.title == "T"


# -- API surface -----------------------------------------------------------------


def test_supported_suffixes_are_exactly_the_documented_ones() -> None:
    assert (
        frozenset({".md", ".markdown", ".html", ".htm", ".pdf", ".txt", ".jsonl", ".jsonl.gz"})
        == SUPPORTED_SUFFIXES
    )


@pytest.mark.parametrize(
    ("name", "content", "kind"),
    [
        ("a.md", "# A\n\nbody", "markdown"),
        ("a.markdown", "body", "markdown"),
        ("A.MD", "body", "markdown"),
        ("a.html", "<p>body</p>", "html"),
        ("a.HTM", "<p>body</p>", "html"),
        ("a.txt", "body", "text"),
        ("a.pdf", make_pdf([["body"]]), "pdf"),
    ],
)
def test_kind_follows_the_suffix_case_insensitively(
    tmp_path: Path, name: str, content: str | bytes, kind: str
) -> None:
    doc = load_one(tmp_path, name, content)
    assert doc.kind == kind
    assert "body" in doc.text


def test_document_fields_for_a_file(tmp_path: Path) -> None:
    path = write(tmp_path, "notes/a.txt", "Title line\nbody\n")
    (doc,) = load_file(path, "notes/a.txt")
    assert doc.id == "notes/a.txt"
    assert doc.source == str(path.absolute())
    assert Path(doc.source).is_absolute()
    assert doc.modified == path.stat().st_mtime
    assert doc.content_hash == hashlib.sha256(path.read_bytes()).hexdigest()
    assert doc.sections == (Section(trail=(), text="Title line\nbody"),)
    assert doc.metadata == {}


@pytest.mark.parametrize(
    ("name", "reason"),
    [
        ("a.png", "unsupported file type '.png'"),
        ("archive.gz", "unsupported file type '.gz'"),
        ("notes.md~", "unsupported file type '.md~'"),
        ("Makefile", "unsupported file type (no file name suffix)"),
    ],
)
def test_load_file_rejects_unsupported_suffixes(tmp_path: Path, name: str, reason: str) -> None:
    with pytest.raises(LoadError) as err:
        load_file(write(tmp_path, name, "text"), name)
    assert str(err.value) == reason


def test_load_file_on_a_missing_file_raises_load_error(tmp_path: Path) -> None:
    with pytest.raises(LoadError, match="file not found"):
        load_file(tmp_path / "gone.md", "gone.md")


# -- Markdown ----------------------------------------------------------------------

FRONT = """---
title: Restoring the database
tags: {tags}
owner: ops
reviewed: 2024-03-01
when: 2024-03-01 10:30:00
limits: {{max: 3, ratio: .nan}}
---
# Restore

Body text.
"""


@pytest.mark.parametrize(
    "tags", ["[db, backup]", '"db, backup"', "db,  backup ,", "\n  - db\n  - backup"]
)
def test_front_matter_gives_title_tags_and_json_safe_metadata(tmp_path: Path, tags: str) -> None:
    doc = load_one(tmp_path, "restore.md", FRONT.format(tags=tags))
    assert doc.title == "Restoring the database"
    assert doc.metadata["tags"] == ["db", "backup"]
    assert doc.metadata["owner"] == "ops"
    assert doc.metadata["reviewed"] == "2024-03-01"
    assert doc.metadata["when"].startswith("2024-03-01T10:30:00")
    assert doc.metadata["limits"] == {"max": 3, "ratio": "nan"}
    assert "title" not in doc.metadata
    json.dumps(doc.metadata, allow_nan=False)
    # The front matter title differs from the H1, so the H1 is an ordinary heading.
    assert texts(doc) == [(("Restore",), "Body text.")]


@pytest.mark.parametrize(
    ("front", "warning"),
    [
        ("title: [unclosed\n", "front matter is not valid YAML; ignored"),
        ("key: value\n  bad indent: x\n", "front matter is not valid YAML; ignored"),
        ("date: 2024-13-45\n", "front matter is not valid YAML; ignored"),
        ("- just\n- a list\n", "front matter is not a YAML mapping; ignored"),
    ],
)
def test_bad_front_matter_is_ignored_with_a_warning(
    tmp_path: Path, front: str, warning: str
) -> None:
    doc = load_one(tmp_path, "page.md", f"---\n{front}---\n# Real title\n\nBody.\n")
    assert doc.metadata == {"warnings": [warning]}
    assert doc.title == "Real title"
    assert texts(doc) == [((), "Body.")]


def test_empty_front_matter_adds_nothing(tmp_path: Path) -> None:
    doc = load_one(tmp_path, "page.md", "---\n---\nBody.\n")
    assert doc.metadata == {}
    assert doc.text == "Body."


def test_unclosed_front_matter_is_body_text(tmp_path: Path) -> None:
    doc = load_one(tmp_path, "page.md", "---\ntitle: x\nstill body\n")
    assert "title: x" in doc.text
    assert doc.title == "Page"


@pytest.mark.parametrize(
    ("name", "content", "title"),
    [
        ("x.md", "---\ntitle: From front\n---\n# From heading\n\nt", "From front"),
        ("x.md", "---\ntitle: 2024\n---\nt", "2024"),
        ("x.md", "intro\n\n## Sub\n\ntext\n\n# First *H1*\n\nt", "First *H1*"),
        ("x.md", "From setext\n===========\n\nt", "From setext"),
        ("restore-db_backup.md", "no headings here", "Restore db backup"),
        ("x.md", "## Only h2\n\nt", "X"),
        ("x.md", "---\ntitle: ''\n---\n# Heading wins\n\nt", "Heading wins"),
    ],
)
def test_markdown_title_rules(tmp_path: Path, name: str, content: str, title: str) -> None:
    assert load_one(tmp_path, name, content).title == title


def test_h1_used_as_title_is_not_in_trails(tmp_path: Path) -> None:
    content = "# Deploys\n\nOverview.\n\n## Rollback\n\nUndo it.\n\n### Database\n\nRestore.\n"
    doc = load_one(tmp_path, "deploys.md", content)
    assert doc.title == "Deploys"
    assert texts(doc) == [
        ((), "Overview."),
        (("Rollback",), "Undo it."),
        (("Rollback", "Database"), "Restore."),
    ]


@pytest.mark.parametrize(
    ("front_title", "first_trail"),
    [("Deploys", ()), ("deploys", ()), ("Release handbook", ("Deploys",))],
)
def test_h1_is_left_out_of_trails_only_when_it_repeats_the_title(
    tmp_path: Path, front_title: str, first_trail: tuple[str, ...]
) -> None:
    doc = load_one(tmp_path, "x.md", f"---\ntitle: {front_title}\n---\n# Deploys\n\nOverview.\n")
    assert doc.title == front_title
    assert texts(doc) == [(first_trail, "Overview.")]


def test_nested_trails_pop_back_to_the_right_level(tmp_path: Path) -> None:
    content = (
        "Preamble.\n\n# Title\n\n## A\n\na\n\n### A1\n\na1\n\n#### A1x\n\na1x\n\n"
        "## B\n\nb\n\n#### B-deep\n\nbd\n\n# Second part\n\n## C\n\nc\n"
    )
    doc = load_one(tmp_path, "x.md", content)
    assert texts(doc) == [
        ((), "Preamble."),
        (("A",), "a"),
        (("A", "A1"), "a1"),
        (("A", "A1", "A1x"), "a1x"),
        (("B",), "b"),
        (("B", "B-deep"), "bd"),
        (("Second part", "C"), "c"),
    ]


def test_empty_sections_are_dropped_but_their_headings_stay_in_trails(tmp_path: Path) -> None:
    doc = load_one(tmp_path, "x.md", "# T\n\n## Empty\n\n### Child\n\ntext\n\n## Also empty\n")
    assert texts(doc) == [(("Empty", "Child"), "text")]


@pytest.mark.parametrize(
    ("line", "heading"),
    [
        ("## Closed ##", "Closed"),
        ("##   Spaced   ", "Spaced"),
        ("## With [link](http://x) and `code`", "With link and code"),
        ("## Anchored {#custom-id}", "Anchored"),
        ("   ## Indented three", "Indented three"),
        ("## C# tips", "C# tips"),
    ],
)
def test_atx_heading_text(tmp_path: Path, line: str, heading: str) -> None:
    doc = load_one(tmp_path, "x.md", f"# T\n\n{line}\n\nbody\n")
    assert texts(doc) == [((heading,), "body")]


@pytest.mark.parametrize(
    "line", ["#hashtag is not a heading", "    # indented code", "####### seven"]
)
def test_lines_that_are_not_atx_headings(tmp_path: Path, line: str) -> None:
    doc = load_one(tmp_path, "x.md", f"# T\n\n{line}\n")
    assert len(doc.sections) == 1
    assert doc.sections[0].trail == ()
    assert line.strip() in doc.sections[0].text


def test_setext_headings_make_sections(tmp_path: Path) -> None:
    content = "Guide\n=====\n\nIntro.\n\nInstall\n-------\n\nRun it.\n\nUpgrade\n---\n\nAgain.\n"
    doc = load_one(tmp_path, "x.md", content)
    assert doc.title == "Guide"
    assert texts(doc) == [((), "Intro."), (("Install",), "Run it."), (("Upgrade",), "Again.")]


def test_setext_heading_takes_the_whole_paragraph(tmp_path: Path) -> None:
    doc = load_one(tmp_path, "x.md", "Before.\n\nLong heading\nover two lines\n---\n\nBody.\n")
    assert texts(doc) == [((), "Before."), (("Long heading over two lines",), "Body.")]


@pytest.mark.parametrize("above", ["- a list item", "> a quote", "| a | table |"])
def test_dash_line_under_a_non_paragraph_is_a_rule_not_a_heading(
    tmp_path: Path, above: str
) -> None:
    doc = load_one(tmp_path, "x.md", f"{above}\n---\n\nafter\n")
    assert all(s.trail == () for s in doc.sections)
    assert "---" not in doc.text
    assert "after" in doc.text


@pytest.mark.parametrize("fence", ["```", "~~~", "````"])
def test_headings_inside_fenced_code_are_ignored_and_code_is_kept(
    tmp_path: Path, fence: str
) -> None:
    content = (
        f"# T\n\n## Shell\n\n{fence}bash\n# install deps\nmake __init__ **x**\n"
        f"Setext?\n---\n{fence}\n\nafter\n"
    )
    doc = load_one(tmp_path, "x.md", content)
    assert texts(doc) == [
        (("Shell",), "# install deps\nmake __init__ **x**\nSetext?\n---\n\nafter")
    ]
    assert fence not in doc.text


def test_fence_indented_in_a_list_item_still_hides_headings(tmp_path: Path) -> None:
    content = "# T\n\n1. Step one\n\n    ```sh\n    # comment\n    run\n    ```\n\n2. Step two\n"
    doc = load_one(tmp_path, "x.md", content)
    assert [s.trail for s in doc.sections] == [()]
    assert "    # comment" in doc.text
    assert "2. Step two" in doc.text


def test_closing_fence_must_match_the_opening(tmp_path: Path) -> None:
    doc = load_one(tmp_path, "x.md", "# T\n\n````\n```\n# still code\n````\n\n## Real\n\nx\n")
    assert texts(doc) == [((), "```\n# still code"), (("Real",), "x")]


def test_unclosed_fence_runs_to_the_end(tmp_path: Path) -> None:
    doc = load_one(tmp_path, "x.md", "# T\n\n```\ncode\n# not heading\n")
    assert texts(doc) == [((), "code\n# not heading")]


@pytest.mark.parametrize(
    ("source", "cleaned"),
    [
        ("See [the runbook](https://wiki/runbook) now", "See the runbook now"),
        ('A [titled](http://x "Title") link', "A titled link"),
        ("Wiki [page](https://en.wikipedia.org/wiki/Foo_(bar)) here", "Wiki page here"),
        ("Logo ![company logo](img/logo.png) here", "Logo company logo here"),
        ("[![build status](badge.svg)](https://ci)", "build status"),
        ("Ref [style][1] link", "Ref style link"),
        ("Auto <https://example.com/x> link", "Auto https://example.com/x link"),
        ("**bold** and __strong__ text", "bold and strong text"),
        ("call `make __init__` and `a**b`", "call make __init__ and a**b"),
        ("keep snake_case_names and 2**10", "keep snake_case_names and 2**10"),
        ("``code with ` tick``", "code with ` tick"),
        ("- list item with **bold**", "- list item with bold"),
        ("| a | **b** |", "| a | b |"),
        ("> quoted text", "quoted text"),
    ],
)
def test_inline_clean_up(tmp_path: Path, source: str, cleaned: str) -> None:
    assert load_one(tmp_path, "x.md", f"# T\n\n{source}\n").text == cleaned


@pytest.mark.parametrize(
    ("comment", "text"),
    [
        ("<!-- note -->", "before  after\n\nnext"),
        ("<!--\n# Not a heading\nsecret\n-->", "before\n after\n\nnext"),
        ("<!-- a --><!-- b -->", "before  after\n\nnext"),
    ],
)
def test_html_comments_are_dropped(tmp_path: Path, comment: str, text: str) -> None:
    doc = load_one(tmp_path, "x.md", f"# T\n\nbefore {comment} after\n\nnext\n")
    assert texts(doc) == [((), text)]


def test_lists_tables_and_blank_lines(tmp_path: Path) -> None:
    content = (
        "# T\n\n- one\n- two\n  - nested\n\n\n\n\n| Col | Val |\n|:---|---:|\n| a | 1 |\n"
        "\n---\n\n[ref]: https://example.com\n[^1]: A footnote stays.\n"
    )
    doc = load_one(tmp_path, "x.md", content)
    assert doc.text == (
        "- one\n- two\n  - nested\n\n| Col | Val |\n| a | 1 |\n\n[^1]: A footnote stays."
    )


def test_markdown_with_only_a_heading_has_no_text(tmp_path: Path) -> None:
    content = "---\ntitle: T\n---\n# T\n\n<!-- nothing -->\n"
    assert skip_reason(tmp_path, "x.md", content) == "no text"


@pytest.mark.parametrize(
    "line",
    ["__a " * 20000, "[" * 20000 + "](" * 20000, "![" * 20000, "[x](a" * 20000, "``a" * 20000],
    ids=["underscores", "brackets", "images", "open-links", "ticks"],
)
def test_pathological_lines_are_cleaned_in_linear_time(tmp_path: Path, line: str) -> None:
    # Unbounded regex repeats made these take seconds each; the bound keeps them instant.
    started = time.perf_counter()
    doc = load_one(tmp_path, "x.md", f"# T\n\n{line}\n")
    assert time.perf_counter() - started < 2
    assert len(doc.text) > 10000


# -- HTML ----------------------------------------------------------------------------

PAGE = """<!DOCTYPE html>
<html><head><title>Restore &amp; recover</title>
<meta name="keywords" content="db, backup , ops">
<meta name="description" content="How to restore">
<meta name="author" content="Ops team">
<style>.x {{ color: red }}</style><script>var tracking = 1;</script>
</head><body>
<nav>NAVIGATION</nav><header>SITE HEADER</header>
{body}
<aside>SIDEBAR</aside><footer>SITE FOOTER</footer>
</body></html>"""


def test_html_metadata_title_and_chrome_removed(tmp_path: Path) -> None:
    body = (
        "<h1>Restore</h1><p>Stop the  service\n first.</p><h2>Steps</h2><p>Run &lt;restore&gt;.</p>"
    )
    doc = load_one(tmp_path, "r.html", PAGE.format(body=body))
    assert doc.kind == "html"
    assert doc.title == "Restore & recover"
    assert doc.metadata == {
        "tags": ["db", "backup", "ops"],
        "description": "How to restore",
        "author": "Ops team",
    }
    # The h1 differs from <title>, so it is a trail level.
    assert texts(doc) == [
        (("Restore",), "Stop the service first."),
        (("Restore", "Steps"), "Run <restore>."),
    ]
    for noise in ("NAVIGATION", "SITE HEADER", "SIDEBAR", "SITE FOOTER", "tracking", "color"):
        assert noise not in doc.text


@pytest.mark.parametrize(
    "element",
    [
        "<script>DROPME()</script>",
        "<style>DROPME {}</style>",
        "<noscript>DROPME</noscript>",
        "<template><p>DROPME</p></template>",
        "<svg><title>DROPME</title><text>DROPME</text></svg>",
        "<nav><a>DROPME</a></nav>",
        "<header>DROPME</header>",
        "<footer>DROPME</footer>",
        "<aside>DROPME</aside>",
        "<form><label>DROPME</label></form>",
        "<iframe>DROPME</iframe>",
        "<div hidden>DROPME</div>",
        '<div aria-hidden="true">DROPME</div>',
        '<ul role="navigation"><li>DROPME</li></ul>',
        '<div style="display: none">DROPME</div>',
        "<div><nav>DROPME<p>nested DROPME</p></nav></div>",
    ],
)
def test_html_dropped_elements(tmp_path: Path, element: str) -> None:
    doc = load_one(tmp_path, "x.html", f"<body><p>kept before</p>{element}<p>kept after</p></body>")
    assert "DROPME" not in doc.text
    assert doc.text == "kept before\n\nkept after"


@pytest.mark.parametrize("root", ["main", "article"])
def test_html_keeps_only_the_first_main_or_article(tmp_path: Path, root: str) -> None:
    html = (
        "<html><head><title>Page title</title></head><body><div>outside</div>"
        f"<{root}><h2>Inside</h2><p>content</p></{root}><div>also outside</div>"
        f"<{root}><p>second root</p></{root}></body></html>"
    )
    doc = load_one(tmp_path, "x.html", html)
    assert doc.title == "Page title"
    assert texts(doc) == [(("Inside",), "content")]


def test_html_header_inside_article_is_kept(tmp_path: Path) -> None:
    html = (
        "<header>site</header>"
        "<article><header><h1>Post</h1><p>by Ann</p></header><p>text</p></article>"
    )
    doc = load_one(tmp_path, "x.html", html)
    assert doc.title == "Post"
    assert texts(doc) == [((), "by Ann\n\ntext")]


def test_html_empty_main_falls_back_to_the_page(tmp_path: Path) -> None:
    doc = load_one(tmp_path, "x.html", "<body><main></main><p>rendered elsewhere</p></body>")
    assert doc.text == "rendered elsewhere"


def test_html_page_wrapped_in_a_form_keeps_its_text(tmp_path: Path) -> None:
    html = '<body><form id="aspnetForm"><h1>Portal page</h1><p>Real content.</p></form></body>'
    doc = load_one(tmp_path, "x.html", html)
    assert doc.title == "Portal page"
    assert doc.text == "Real content."


def test_html_tables_lists_and_pre(tmp_path: Path) -> None:
    html = (
        "<table><tr><th>Host</th><th>Role</th></tr><tr><td>db1</td><td><p>primary</p></td></tr>"
        "<tr><td>db2</td><td>replica</td></tr></table>"
        "<ul><li>one<li>two</ul><pre>  indented\n    code</pre><p>a<br>b</p>"
    )
    doc = load_one(tmp_path, "x.html", html)
    assert doc.text == (
        "Host | Role\ndb1 | primary\ndb2 | replica\n\none\ntwo\n\n  indented\n    code\n\na\nb"
    )


@pytest.mark.parametrize(
    ("html", "title", "sections"),
    [
        ("<title>T</title><h1>T</h1><p>x</p>", "T", [((), "x")]),
        ("<title>T</title><h1>Other</h1><p>x</p>", "T", [(("Other",), "x")]),
        ("<h1>From h1</h1><h2>Sub</h2><p>x</p>", "From h1", [(("Sub",), "x")]),
        ("<title>  </title><h1>From h1</h1><p>x</p>", "From h1", [((), "x")]),
        (
            "<h2>A</h2><p>a</p><h3>B</h3><p>b</p><h2>C</h2><p>c</p>",
            "Stem name",
            [(("A",), "a"), (("A", "B"), "b"), (("C",), "c")],
        ),
        ("<h2>Open<h3>Inner</h3><p>x</p>", "Stem name", [(("Open", "Inner"), "x")]),
        ("<h2>Mis</h3><p>x</p>", "Stem name", [(("Mis",), "x")]),
    ],
)
def test_html_title_and_heading_trails(
    tmp_path: Path, html: str, title: str, sections: list[tuple[tuple[str, ...], str]]
) -> None:
    doc = load_one(tmp_path, "stem_name.html", html)
    assert doc.title == title
    assert texts(doc) == sections


def test_html_entities_and_whitespace(tmp_path: Path) -> None:
    doc = load_one(tmp_path, "x.html", "<p>caf&eacute;&nbsp;&#8212;  &quot;ok&quot;\n\t done</p>")
    assert doc.text == 'café — "ok" done'


def test_html_without_markup_is_skipped(tmp_path: Path) -> None:
    assert skip_reason(tmp_path, "x.html", "just words, 1 < 2") == "not HTML: no markup found"


@pytest.mark.parametrize(
    "html", ["<html><head><title>T</title></head><body></body></html>", "<script>x()</script>"]
)
def test_html_without_text_is_skipped(tmp_path: Path, html: str) -> None:
    assert skip_reason(tmp_path, "x.html", html) == "no text"


def test_html_declared_charset_is_used_for_non_utf8_bytes(tmp_path: Path) -> None:
    data = '<meta charset="windows-1252"><p>caf\u00e9 \u2013 ok</p>'.encode("cp1252")
    doc = load_one(tmp_path, "x.html", data)
    assert doc.text == "café – ok"
    assert "warnings" not in doc.metadata


# -- PDF ------------------------------------------------------------------------------


def test_pdf_pages_keep_their_numbers(tmp_path: Path) -> None:
    data = make_pdf([["Quarterly report", "Revenue up"], [], ["Page three"]], author="Ann")
    doc = load_one(tmp_path, "report.pdf", data)
    assert doc.kind == "pdf"
    assert doc.sections == (
        Section(trail=(), text="Quarterly report\nRevenue up", page=1),
        Section(trail=(), text="Page three", page=3),
    )
    assert doc.metadata == {"pages": 3, "author": "Ann"}
    assert doc.title == "Quarterly report"
    assert doc.content_hash == hashlib.sha256(data).hexdigest()


@pytest.mark.parametrize(
    ("pages", "title", "expected"),
    [
        ([["First line", "x"]], "Info title", "Info title"),
        ([["First line", "x"]], "   ", "First line"),
        ([["First line", "x"]], None, "First line"),
        ([["L" * 121, "x"]], None, "Annual review"),
        ([[], ["Second page"]], None, "Annual review"),
    ],
)
def test_pdf_title_rules(
    tmp_path: Path, pages: list[list[str]], title: str | None, expected: str
) -> None:
    assert load_one(tmp_path, "annual_review.pdf", make_pdf(pages, title=title)).title == expected


def test_encrypted_pdf_is_skipped_with_a_reason(tmp_path: Path) -> None:
    data = encrypt_pdf(make_pdf([["secret text"]]), "secret")
    assert skip_reason(tmp_path, "locked.pdf", data) == "encrypted PDF (no password available)"


def test_pdf_encrypted_with_an_empty_user_password_loads(tmp_path: Path) -> None:
    data = encrypt_pdf(make_pdf([["open text"]]), "", owner="owner-only")
    assert load_one(tmp_path, "x.pdf", data).text == "open text"


@pytest.mark.parametrize(
    "data",
    [b"this is not a PDF at all", b"%PDF-1.4\n1 0 obj garbage", make_pdf([["cut"]])[:150]],
)
def test_malformed_pdf_is_skipped(tmp_path: Path, data: bytes) -> None:
    assert skip_reason(tmp_path, "bad.pdf", data).startswith("malformed PDF: ")


def test_pdf_without_a_text_layer_is_skipped(tmp_path: Path) -> None:
    reason = skip_reason(tmp_path, "scan.pdf", make_pdf([[], []]))
    assert reason == "no text (scanned PDF without a text layer?)"


def test_load_file_raises_load_error_for_a_bad_pdf(tmp_path: Path) -> None:
    with pytest.raises(LoadError, match="^malformed PDF: "):
        load_file(write(tmp_path, "bad.pdf", b"\x00\x01garbage"), "bad.pdf")


# -- plain text -------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("content", "title", "text"),
    [
        ("Release notes\n\nFixed things.\n", "Release notes", "Release notes\n\nFixed things."),
        ("\n\n   Padded title  \nbody", "Padded title", "   Padded title\nbody"),
        ("x" * 121 + "\nbody", "Ops log", "x" * 121 + "\nbody"),
        ("x" * 120, "x" * 120, "x" * 120),
        ("a\n\n\n\n\nb", "a", "a\n\nb"),
    ],
)
def test_text_title_rule(tmp_path: Path, content: str, title: str, text: str) -> None:
    doc = load_one(tmp_path, "ops_log.txt", content)
    assert doc.title == title
    assert doc.sections == (Section(trail=(), text=text),)


# -- corpus.jsonl --------------------------------------------------------------------------

RECORDS = [
    {"_id": "d1", "title": "Aspirin", "text": "Aspirin reduces fever.", "url": "http://a"},
    {"_id": "d2", "title": "", "text": "Untitled record.", "metadata": {"year": 2020}},
    {"_id": 3, "text": "Numeric id, no title.", "metadata": None},
]


def corpus_bytes(records: list[object]) -> bytes:
    return b"".join(
        (r if isinstance(r, bytes) else json.dumps(r).encode()) + b"\n" for r in records
    )


@pytest.mark.parametrize("name", ["corpus.jsonl", "corpus.jsonl.gz", "CORPUS.JSONL"])
def test_corpus_records_become_documents(tmp_path: Path, name: str) -> None:
    raw = corpus_bytes(RECORDS)
    path = write(tmp_path / "root", name, gzip.compress(raw) if name.endswith(".gz") else raw)
    docs, skipped = walk(tmp_path / "root")
    assert skipped == {}
    assert list(docs) == ["d1", "d2", "3"]
    d1, d2, d3 = docs.values()
    assert (d1.title, d2.title, d3.title) == ("Aspirin", "", "")
    assert d1.sections == (Section(trail=(), text="Aspirin reduces fever."),)
    assert d1.source == f"{path.absolute()}#d1"
    assert {d.kind for d in docs.values()} == {"corpus"}
    assert d1.metadata == {"url": "http://a"}
    assert d2.metadata == {"year": 2020}
    assert d3.metadata == {}
    assert d1.modified == path.stat().st_mtime
    lines = raw.split(b"\n")
    assert [d.content_hash for d in docs.values()] == [
        hashlib.sha256(line).hexdigest() for line in lines[:3]
    ]


def test_gzip_and_plain_corpus_give_the_same_hashes(tmp_path: Path) -> None:
    raw = corpus_bytes(RECORDS)
    plain = load_file(write(tmp_path, "c.jsonl", raw), "c.jsonl")
    packed = load_file(write(tmp_path, "c.jsonl.gz", gzip.compress(raw)), "c.jsonl.gz")
    assert [d.content_hash for d in plain] == [d.content_hash for d in packed]
    assert [d.id for d in plain] == [d.id for d in packed] == ["d1", "d2", "3"]


@pytest.mark.parametrize(
    ("line", "reason"),
    [
        (b"{not json", "invalid JSON: "),
        (b'["a", "list"]', "not a JSON object"),
        (b'{"title": "t", "text": "x"}', "record has no '_id'"),
        (b'{"_id": "x9", "title": "t"}', "record has no 'text'"),
        (b'{"_id": "x9", "text": 5}', "'text' must be a string"),
        (b'{"_id": ["x"], "text": "x"}', "'_id' must be a non-empty string"),
        (b'{"_id": "", "text": "x"}', "'_id' must be a non-empty string"),
        (b'{"_id": true, "text": "x"}', "'_id' must be a non-empty string"),
        (b'{"_id": "x9", "title": "", "text": "  "}', "no text"),
    ],
)
def test_bad_corpus_line_is_skipped_with_its_line_number(
    tmp_path: Path, line: bytes, reason: str
) -> None:
    raw = corpus_bytes([RECORDS[0], b"", line, RECORDS[1]])
    write(tmp_path / "root", "sub/corpus.jsonl", raw)
    docs, skipped = walk(tmp_path / "root")
    assert list(docs) == ["d1", "d2"]
    assert list(skipped) == ["sub/corpus.jsonl:3"]
    assert skipped["sub/corpus.jsonl:3"].startswith(reason)


def test_corpus_crlf_bom_and_invalid_utf8_per_record(tmp_path: Path) -> None:
    raw = (
        b'\xef\xbb\xbf{"_id": "a", "text": "line one\\r\\nline two"}\r\n'
        b'{"_id": "b", "text": "bad \xff byte"}\r\n'
    )
    docs = load_file(write(tmp_path, "c.jsonl", raw), "ignored")
    assert [d.id for d in docs] == ["a", "b"]
    assert docs[0].text == "line one\nline two"
    assert "warnings" not in docs[0].metadata
    assert docs[1].text == "bad \ufffd byte"
    assert docs[1].metadata["warnings"] == ["invalid UTF-8 replaced with U+FFFD"]


def test_title_only_corpus_record_is_a_document_without_sections(tmp_path: Path) -> None:
    # Old test collections (CACM, for one) hold records that are only a title.
    raw = corpus_bytes([b'{"_id": "t1", "title": "Parallel  sorting", "text": ""}'])
    (doc,) = load_file(write(tmp_path, "c.jsonl", raw), "c.jsonl")
    assert (doc.title, doc.sections, doc.text) == ("Parallel sorting", (), "")


def test_corpus_title_is_never_invented(tmp_path: Path) -> None:
    docs = load_file(write(tmp_path, "c.jsonl", corpus_bytes([RECORDS[1]])), "c.jsonl")
    assert docs[0].title == ""


def test_load_file_on_a_corpus_drops_bad_lines(tmp_path: Path) -> None:
    path = write(tmp_path, "c.jsonl", corpus_bytes([RECORDS[0], b"{oops", RECORDS[2]]))
    assert [d.id for d in load_file(path, "c.jsonl")] == ["d1", "3"]


def test_load_file_on_a_corpus_without_good_records_raises(tmp_path: Path) -> None:
    path = write(tmp_path, "c.jsonl", b"{oops\n[]\n")
    with pytest.raises(LoadError, match=r"^no valid records \(line 1: invalid JSON"):
        load_file(path, "c.jsonl")


@pytest.mark.parametrize("content", [b"", b"\n\n  \n"])
def test_corpus_without_records_has_no_text(tmp_path: Path, content: bytes) -> None:
    assert skip_reason(tmp_path, "c.jsonl", content) == "no text"


def test_gzip_that_is_not_gzip_is_skipped(tmp_path: Path) -> None:
    reason = skip_reason(tmp_path, "c.jsonl.gz", b"not gzip at all")
    assert reason.startswith("corrupt gzip file: BadGzipFile: ")


def test_truncated_gzip_corpus_keeps_the_records_before_the_damage(tmp_path: Path) -> None:
    records = [{"_id": f"d{i}", "text": f"text {i} " * 30} for i in range(2000)]
    write(tmp_path / "root", "c.jsonl.gz", gzip.compress(corpus_bytes(records))[:-30])
    items = list(iter_root(tmp_path / "root"))
    docs = [i for i in items if isinstance(i, Document)]
    assert 0 < len(docs) < 2000
    assert [d.id for d in docs] == [f"d{i}" for i in range(len(docs))]
    assert isinstance(items[-1], Skipped) and items[-1].path == "c.jsonl.gz"
    assert items[-1].reason.startswith("corrupt gzip file (after line ")


def test_large_corpus_streams_every_record(tmp_path: Path) -> None:
    records = [{"_id": f"doc{i}", "title": f"T{i}", "text": f"text {i} " * 20} for i in range(5000)]
    write(tmp_path / "root", "corpus.jsonl.gz", gzip.compress(corpus_bytes(records)))
    ids = [item.id for item in iter_root(tmp_path / "root") if isinstance(item, Document)]
    assert ids == [f"doc{i}" for i in range(5000)]


# -- walking a root ---------------------------------------------------------------------------


def test_ids_are_relative_posix_paths(tmp_path: Path) -> None:
    write(tmp_path, "runbooks/db/restore.md", "# Restore\n\nx")
    write(tmp_path, "runbooks/deploy.txt", "Deploy\nx")
    write(tmp_path, "top.html", "<p>x</p>")
    write(tmp_path, "runbooks/db/icon.png", b"\x89PNG")
    docs, skipped = walk(tmp_path)
    assert list(docs) == ["runbooks/db/restore.md", "runbooks/deploy.txt", "top.html"]
    assert all("\\" not in i for i in docs)
    assert skipped == {"runbooks/db/icon.png": "unsupported file type '.png'"}


def test_single_file_root_uses_the_file_name(tmp_path: Path) -> None:
    path = write(tmp_path, "deep/dir/notes.md", "# Notes\n\nx")
    docs, skipped = walk(path)
    assert list(docs) == ["notes.md"]
    assert docs["notes.md"].source == str(path.absolute())
    bad = write(tmp_path, "deep/dir/pic.jpg", b"x")
    assert walk(bad) == ({}, {"pic.jpg": "unsupported file type '.jpg'"})


def test_hidden_files_and_folders_are_ignored_silently(tmp_path: Path) -> None:
    write(tmp_path, ".hidden.md", "x")
    write(tmp_path, ".git/HEAD.txt", "x")
    write(tmp_path, "docs/.obsidian/config.md", "x")
    write(tmp_path, "docs/.DS_Store", b"\x00\x01")
    write(tmp_path, "docs/visible.md", "x")
    assert walk(tmp_path) == (walk(tmp_path)[0], {})
    assert list(walk(tmp_path)[0]) == ["docs/visible.md"]


def test_a_hidden_root_given_explicitly_is_walked(tmp_path: Path) -> None:
    write(tmp_path, ".wiki/page.md", "x")
    assert list(walk(tmp_path / ".wiki")[0]) == ["page.md"]


@pytest.mark.parametrize(("size", "loaded"), [(99, True), (100, True), (101, False)])
def test_size_limit(tmp_path: Path, size: int, loaded: bool) -> None:
    write(tmp_path, "big.txt", "a" * size)
    docs, skipped = walk(tmp_path, max_file_bytes=100)
    if loaded:
        assert list(docs) == ["big.txt"] and skipped == {}
    else:
        assert docs == {}
        assert skipped == {
            "big.txt": "file is 101 bytes, over the limit of 100 bytes (setting max_file_bytes)"
        }


def test_size_limit_applies_before_parsing(tmp_path: Path) -> None:
    write(tmp_path, "big.pdf", b"garbage" * 100)
    _, skipped = walk(tmp_path, max_file_bytes=10)
    assert skipped["big.pdf"].startswith("file is 700 bytes, over the limit of 10 bytes")


@pytest.mark.parametrize("limit", [0, -1])
def test_nonpositive_size_limit_is_a_settings_error(tmp_path: Path, limit: int) -> None:
    with pytest.raises(SettingsError, match="max_file_bytes"):
        list(iter_root(tmp_path, max_file_bytes=limit))


def test_missing_root_is_a_settings_error(tmp_path: Path) -> None:
    with pytest.raises(SettingsError, match="does not exist"):
        list(iter_root(tmp_path / "nope"))


@pytest.mark.parametrize("name", ["a.md", "a.txt", "a.html", "a.pdf", "a.jsonl", "a.jsonl.gz"])
@pytest.mark.parametrize("content", [b"", b"   \n\t\n"])
def test_empty_files_have_no_text(tmp_path: Path, name: str, content: bytes) -> None:
    if name.endswith(".gz"):
        content = gzip.compress(content)
    assert skip_reason(tmp_path, name, content) == "no text"


@pytest.mark.parametrize("name", ["a.md", "a.markdown", "a.txt", "a.html", "a.htm", "a.jsonl"])
def test_binary_content_in_a_text_file_is_skipped(tmp_path: Path, name: str) -> None:
    data = b"<p>looks like text</p>\x00\x00\x01\x02"
    assert skip_reason(tmp_path, name, data) == "binary content in a text file"


def test_binary_corpus_inside_gzip_is_skipped(tmp_path: Path) -> None:
    data = gzip.compress(b"\x00\x01\x02 binary")
    assert skip_reason(tmp_path, "c.jsonl.gz", data) == "binary content in a text file"


def test_nul_after_the_first_8_kib_is_not_binary(tmp_path: Path) -> None:
    doc = load_one(tmp_path, "log.txt", b"Log\n" + b"a" * 9000 + b"\x00tail")
    assert doc.text.endswith("\x00tail")


@pytest.mark.parametrize("name", ["a.md", "a.txt", "a.html"])
def test_invalid_utf8_is_replaced_with_a_warning(tmp_path: Path, name: str) -> None:
    data = b"caf\xe9 au lait"
    doc = load_one(tmp_path, name, b"<p>" + data + b"</p>" if name.endswith("html") else data)
    assert "caf\ufffd au lait" in doc.text
    assert doc.metadata["warnings"] == ["invalid UTF-8 replaced with U+FFFD"]


@pytest.mark.parametrize(
    ("data", "text"),
    [
        (b"\xef\xbb\xbfTitle\r\nline two\r\n", "Title\nline two"),
        (b"Old\rMac\rlines", "Old\nMac\nlines"),
        ("Wide\r\ntext \u00e9".encode("utf-16"), "Wide\ntext \u00e9"),
    ],
    ids=["bom-crlf", "cr", "utf16"],
)
def test_bom_and_line_ends_are_normalised(tmp_path: Path, data: bytes, text: str) -> None:
    doc = load_one(tmp_path, "x.txt", data)
    assert doc.text == text
    assert not doc.title.startswith("\ufeff")
    assert "warnings" not in doc.metadata


@pytest.mark.skipif(not hasattr(os, "symlink"), reason="needs symbolic links")
def test_symlinked_folders_are_not_followed_so_loops_end(tmp_path: Path) -> None:
    write(tmp_path, "a/page.md", "x")
    (tmp_path / "a" / "loop").symlink_to(tmp_path, target_is_directory=True)
    (tmp_path / "a" / "self").symlink_to(tmp_path / "a", target_is_directory=True)
    docs, skipped = walk(tmp_path)
    assert list(docs) == ["a/page.md"]
    assert skipped == {
        "a/loop": "symbolic link to a folder; not followed",
        "a/self": "symbolic link to a folder; not followed",
    }


@pytest.mark.skipif(not hasattr(os, "symlink"), reason="needs symbolic links")
def test_symlinked_files_inside_are_followed_others_skipped(tmp_path: Path) -> None:
    outside = write(tmp_path, "outside/secret.md", "# Secret\n\nx")
    root = tmp_path / "root"
    write(root, "pages/shared.md", "# Shared\n\nx")
    (root / "alias.md").symlink_to(root / "pages" / "shared.md")
    (root / "leak.md").symlink_to(outside)
    (root / "broken.md").symlink_to(tmp_path / "missing.md")
    (root / "cycle.md").symlink_to(root / "cycle.md")
    docs, skipped = walk(root)
    assert sorted(docs) == ["alias.md", "pages/shared.md"]
    assert docs["alias.md"].title == "Shared"
    assert skipped == {
        "broken.md": "broken symbolic link",
        "cycle.md": "broken symbolic link",
        "leak.md": "symbolic link to a file outside the indexed folder; not followed",
    }


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs FIFOs")
def test_special_files_are_skipped_without_blocking(tmp_path: Path) -> None:
    os.mkfifo(tmp_path / "pipe.txt")
    assert walk(tmp_path) == ({}, {"pipe.txt": "not a regular file"})


def test_unreadable_file_is_skipped(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    write(tmp_path, "secret.md", "x")
    write(tmp_path, "open.md", "x")

    def deny(path: Path) -> bytes:
        if path.name == "secret.md":
            raise PermissionError(13, "Permission denied", str(path))
        return path.read_bytes()

    monkeypatch.setattr(loaders, "_read_bytes", deny)
    docs, skipped = walk(tmp_path)
    assert list(docs) == ["open.md"]
    assert skipped == {"secret.md": "permission denied"}
    with pytest.raises(LoadError, match="^permission denied$"):
        load_file(tmp_path / "secret.md", "secret.md")


@pytest.mark.skipif(sys.platform == "win32" or os.geteuid() == 0, reason="root can read anything")
def test_unreadable_file_and_folder_on_disk(tmp_path: Path) -> None:
    locked_file = write(tmp_path, "locked.md", "x")
    locked_dir = tmp_path / "private"
    write(locked_dir, "inside.md", "x")
    locked_file.chmod(0)
    locked_dir.chmod(0)
    try:
        assert walk(tmp_path) == (
            {},
            {"locked.md": "permission denied", "private": "permission denied"},
        )
    finally:
        locked_dir.chmod(0o755)
        locked_file.chmod(0o644)


def test_unreadable_folder_is_skipped(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    write(tmp_path, "private/inside.md", "x")
    write(tmp_path, "public/page.md", "x")
    real_scandir = os.scandir

    def scandir(path: str | os.PathLike[str]) -> object:
        if Path(path).name == "private":
            raise PermissionError(13, "Permission denied", str(path))
        return real_scandir(path)

    monkeypatch.setattr(os, "scandir", scandir)
    docs, skipped = walk(tmp_path)
    assert list(docs) == ["public/page.md"]
    assert skipped == {"private": "permission denied"}


def test_walk_order_is_sorted_and_repeatable(tmp_path: Path) -> None:
    for rel in ["b.md", "a/z.md", "a/b/c.txt", "C.md", "a.md", "aa/x.md"]:
        write(tmp_path, rel, "x")
    first = [i.id if isinstance(i, Document) else i.path for i in iter_root(tmp_path)]
    second = [i.id if isinstance(i, Document) else i.path for i in iter_root(tmp_path)]
    assert first == second == ["C.md", "a/b/c.txt", "a/z.md", "a.md", "aa/x.md", "b.md"]


def test_content_hash_tracks_bytes_not_timestamps(tmp_path: Path) -> None:
    path = write(tmp_path, "page.md", "# Page\n\nversion one\n")
    first = load_file(path, "page.md")[0].content_hash
    os.utime(path, (1_000_000, 1_000_000))
    again = load_file(path, "page.md")[0]
    assert again.content_hash == first
    assert again.modified == 1_000_000
    path.write_bytes(b"# Page\n\nversion one\n ")  # one trailing space more
    assert load_file(path, "page.md")[0].content_hash != first


def test_parser_crash_is_a_skip_and_the_run_goes_on(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    write(tmp_path, "a.txt", "x")
    write(tmp_path, "b.md", "# B\n\nfine")

    def boom(text: str, stem: str) -> None:
        raise ValueError("unexpected state")

    monkeypatch.setattr(loaders, "parse_text", boom)
    docs, skipped = walk(tmp_path)
    assert list(docs) == ["b.md"]
    assert skipped == {"a.txt": "cannot parse text: ValueError: unexpected state"}
    with pytest.raises(LoadError, match="cannot parse text"):
        load_file(tmp_path / "a.txt", "a.txt")


@pytest.mark.parametrize("exc", [KeyboardInterrupt, MemoryError])
def test_interrupts_and_memory_errors_propagate(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, exc: type[BaseException]
) -> None:
    write(tmp_path, "a.txt", "x")

    def boom(text: str, stem: str) -> None:
        raise exc()

    monkeypatch.setattr(loaders, "parse_text", boom)
    with pytest.raises(exc):
        list(iter_root(tmp_path))


def test_metadata_of_every_kind_is_json_serialisable(tmp_path: Path) -> None:
    write(tmp_path, "a.md", "---\nwhen: 2024-01-01\nset: !!set {a, b}\nraw: !!binary aGk=\n---\nx")
    write(tmp_path, "b.html", '<meta name="keywords" content="k"><p>x</p>')
    write(tmp_path, "c.pdf", make_pdf([["x"]], author="A"))
    write(tmp_path, "d.jsonl", corpus_bytes(RECORDS))
    write(tmp_path, "e.txt", b"bad \xff")
    docs, skipped = walk(tmp_path)
    assert skipped == {}
    assert len(docs) == 7
    assert docs["a.md"].metadata == {"when": "2024-01-01", "set": ["a", "b"], "raw": "hi"}
    for doc in docs.values():
        json.dumps(doc.metadata, allow_nan=False)


@settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    suffix=st.sampled_from([".md", ".html", ".txt", ".jsonl"]),
    text=st.text(
        alphabet=st.sampled_from(list("#=-`~*_[]()<>!|/\\:\"'{}\n \tab1\u00e9")), max_size=300
    ),
)
def test_any_text_loads_or_fails_with_load_error(tmp_path: Path, suffix: str, text: str) -> None:
    path = write(tmp_path, f"fuzz{suffix}", text)
    try:
        docs = load_file(path, path.name)
    except LoadError as exc:
        assert str(exc)
        return
    for doc in docs:
        assert doc.sections and all(s.text.strip() for s in doc.sections)
        assert all(all(t for t in s.trail) for s in doc.sections)
        json.dumps(doc.metadata, allow_nan=False)
