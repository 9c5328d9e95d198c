"""Loaders: HTML.

Metadata, what is dropped and kept, titles and trails, charsets, skips.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.unit.loading import load_one, skip_reason, texts

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
