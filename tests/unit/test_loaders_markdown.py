"""Loaders: Markdown.

Front matter, titles, heading trails, fences, inline clean-up.
"""

from __future__ import annotations

import json
import time
from pathlib import Path

import pytest

from tests.unit.loading import load_one, skip_reason, texts

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
    ("front", "reason"),
    [
        ("title: [unclosed\n", "front matter is not valid YAML"),
        ("key: value\n  bad indent: x\n", "front matter is not valid YAML"),
        ("- just\n- a list\n", "front matter is not a YAML mapping"),
    ],
)
def test_bad_front_matter_skips_the_page(tmp_path: Path, front: str, reason: str) -> None:
    # Fail closed: the front matter may hold the page's groups (indexer/access.py).
    got = skip_reason(tmp_path, "page.md", f"---\n{front}---\n# Real title\n\nBody.\n")
    assert got.startswith(reason) and "groups cannot be read" in got


def test_an_impossible_date_stays_text(tmp_path: Path) -> None:
    doc = load_one(tmp_path, "page.md", "---\ndate: 2024-13-45\n---\n# Real title\n\nBody.\n")
    assert doc.metadata == {"date": "2024-13-45"}
    assert doc.title == "Real title"


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
        ("x.md", "intro\n\n## Sub\n\ntext\n\n# First *H1*\n\nt", "First H1"),
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


@pytest.mark.parametrize("above", ["- a list item", "> a quote", "| a | table |\n| - | - |"])
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
    # The code stays under its item, indented like the item's text.
    assert doc.text == "1. Step one\n   # comment\n   run\n2. Step two"


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
        ("Ref [style][1] link\n\n[1]: https://x", "Ref style link"),
        ("Auto <https://example.com/x> link", "Auto https://example.com/x link"),
        ("**bold** and __strong__ text", "bold and strong text"),
        ("call `make __init__` and `a**b`", "call make __init__ and a**b"),
        ("keep snake_case_names and 2**10", "keep snake_case_names and 2**10"),
        ("``code with ` tick``", "code with ` tick"),
        ("- list item with **bold**", "• list item with bold"),
        ("1) ~~old~~ *new* step", "1) old new step"),
        # Not a table without its delimiter row (CommonMark): the pipes are text.
        ("| a | **b** |", "| a | b |"),
        ("line one  \nline two\nsame line", "line one\nline two same line"),
        ("caf&eacute; \\*literal\\* <b>tag</b>", "café *literal* tag"),
        ("> quoted text", "quoted text"),
    ],
)
def test_inline_clean_up(tmp_path: Path, source: str, cleaned: str) -> None:
    assert load_one(tmp_path, "x.md", f"# T\n\n{source}\n").text == cleaned


@pytest.mark.parametrize("comment", ["<!-- note -->", "<!-- a --><!-- b -->"])
def test_html_comments_are_dropped(tmp_path: Path, comment: str) -> None:
    doc = load_one(tmp_path, "x.md", f"# T\n\nbefore {comment} after\n\nnext\n")
    assert texts(doc) == [((), "before  after\n\nnext")]


def test_a_comment_block_hides_its_headings_and_text(tmp_path: Path) -> None:
    # A comment that opens a line is an HTML block (CommonMark 4.6) up to the line with "-->".
    content = "# T\n\nbefore\n<!--\n# Not a heading\nsecret\n--> after\n\nnext\n"
    assert texts(load_one(tmp_path, "x.md", content)) == [((), "before\n\nafter\n\nnext")]


def test_raw_html_blocks_keep_their_text_only(tmp_path: Path) -> None:
    content = "# T\n\n<details>\n<summary>More</summary>\n<script>x()</script>\n</details>\n"
    assert load_one(tmp_path, "x.md", content).text == "More"


def test_lists_tables_and_blank_lines(tmp_path: Path) -> None:
    content = (
        "# T\n\n- one\n- two\n  - nested\n\n\n\n\n| Col | Val |\n|:---|---:|\n| a | 1 |\n"
        "| *b* | |\n\n---\n\n[ref]: https://example.com\n[^1]: A footnote stays.\n"
    )
    doc = load_one(tmp_path, "x.md", content)
    # Bullets instead of markers; a table's rows one a line, its cells split by tabs
    # (trailing empty cells go with the line's trailing white space).
    assert doc.text == "• one\n• two\n  • nested\n\nCol\tVal\na\t1\nb\n\n[^1]: A footnote stays."


def test_loose_and_numbered_lists_keep_their_numbers(tmp_path: Path) -> None:
    content = "# T\n\n3. Rail\n\n   Rail is the default.\n\n4. Road\n   - vans\n"
    doc = load_one(tmp_path, "x.md", content)
    assert doc.text == "3. Rail\n   Rail is the default.\n4. Road\n   • vans"


def test_markdown_with_only_a_heading_has_no_text(tmp_path: Path) -> None:
    content = "---\ntitle: T\n---\n# T\n\n<!-- nothing -->\n"
    assert skip_reason(tmp_path, "x.md", content) == "no text"


@pytest.mark.parametrize(
    "line",
    ["__a " * 10000, "[" * 10000 + "](" * 10000, "![" * 10000, "[x](a" * 10000, "``a" * 10000],
    ids=["underscores", "brackets", "images", "open-links", "ticks"],
)
def test_pathological_lines_are_cleaned_in_linear_time(tmp_path: Path, line: str) -> None:
    # Quadratic parsing would take minutes here; markdown-it-py takes about 0.4 s for the
    # slowest (images) on an idle core, so the bound leaves room for a busy machine.
    started = time.perf_counter()
    doc = load_one(tmp_path, "x.md", f"# T\n\n{line}\n")
    assert time.perf_counter() - started < 5
    assert len(doc.text) >= 10000
