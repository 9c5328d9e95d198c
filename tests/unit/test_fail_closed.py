"""A restricted page never shows through: what cannot be read with certainty is not indexed.

Folder runs skip such a document with the reason in the run's report; a push answers 422
with the reason. Seeded fake encoder, real SQLite and FAISS, the app in process.
"""

from __future__ import annotations

import json
import logging
from pathlib import Path

import httpx
import pytest
from fastapi import FastAPI
from fastapi.testclient import TestClient
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.settings import IndexSettings
from sounding.indexer.store import IndexReader
from sounding.service.app import create_app

from tests.conftest import ServeIndex

PAY = "# Pay review\n\nBand C earns the quillwort bonus.\n"
# An unquoted colon in a value: not valid YAML, so PyYAML raises and the groups are lost.
MALFORMED = f"---\ntitle: Pay review: 2026\ngroups: [hr]\n---\n{PAY}"
# 7 levels of aliases, 9 each: 450 bytes that PyYAML expands into 9**7 strings.
LAUGHS = "a: &a [lol, lol, lol, lol, lol, lol, lol, lol, lol]\n" + "".join(
    f"{c}: &{c} [*{p}, *{p}, *{p}, *{p}, *{p}, *{p}, *{p}, *{p}, *{p}]\n"
    for p, c in zip("abcdef", "bcdefg", strict=True)
)
RULES = "restrict:\n  - under: hr/\n    groups: [hr]\n"
KEYS = [
    ("reader", "read", "", False),
    ("hr", "read", "hr", False),
    ("w", "write", "", False),
    ("hr-w", "write", "hr", False),  # a key may push only what it may read itself
]


def index(tmp_path: Path, pages: dict[str, str | bytes], **kw: object) -> tuple[object, Path]:
    root = tmp_path / "wiki"
    for rel, text in pages.items():
        (root / rel).parent.mkdir(parents=True, exist_ok=True)
        data = text.encode() if isinstance(text, str) else text
        (root / rel).write_bytes(data)
    settings = IndexSettings(index_dir=tmp_path / "idx", chunk_tokens=64, chunk_overlap=8, **kw)
    return refresh_index([root], settings, HashingEmbedder(16)), settings.index_dir


def groups_of(index_dir: Path) -> dict[str, list[str]]:
    reader = IndexReader(index_dir)
    try:
        docs = {d: reader.document(d) for d in ("hr/pay.md", "HR/pay.md", "ｈｒ/pay.md")}
    finally:
        reader.close()
    return {d: list(doc.groups) for d, doc in docs.items() if doc is not None}


@pytest.fixture(scope="module")
def api(serve_index: ServeIndex, tmp_path_factory: pytest.TempPathFactory):
    rules = tmp_path_factory.mktemp("rules") / "rules.yaml"
    rules.write_text(RULES)
    return serve_index(
        {"public.md": "# Open day\n\nVisitors welcome.\n"},
        embedder=HashingEmbedder(16),
        keys=KEYS,
        access_rules=rules,
        max_document_chunks=40,
        chunk_tokens=64,
        chunk_overlap=8,
    )


def put(api, doc_id: str, text: str, key: str = "w") -> httpx.Response:
    body = {"text": text, "format": "markdown"}
    return api.client.put(f"/documents/{doc_id}", json=body, headers=api.auth(key))


def readers_see(api, doc_id: str) -> bool:
    return api.client.get(f"/documents/{doc_id}", headers=api.auth("reader")).status_code == 200


# -- finding 1: malformed front matter ------------------------------------------------------


def test_malformed_front_matter_skips_the_page_and_the_report_says_why(tmp_path: Path) -> None:
    report, index_dir = index(tmp_path, {"pay.md": MALFORMED, "ok.md": "# Ok\n\nFine.\n"})
    skipped = {s.path: s.reason for s in report.skipped}
    assert "not valid YAML" in skipped["pay.md"] and "line 2" in skipped["pay.md"]
    assert "skipped pay.md: front matter is not valid YAML" in report.text()
    reader = IndexReader(index_dir)
    assert reader.document("pay.md") is None and reader.document("ok.md") is not None
    reader.close()


@pytest.mark.parametrize(
    ("front", "why"),
    [
        ("groups: [hr]\ngroups: []\n", "repeats the key 'groups'"),
        ("Groups: [hr]\n", "'Groups' is not read"),
        ("groups:\n", "present but empty"),
        ("- groups: [hr]\n", "not a YAML mapping"),
    ],
)
def test_groups_that_cannot_be_read_with_certainty_skip_the_page(
    tmp_path: Path, front: str, why: str
) -> None:
    report, _ = index(tmp_path, {"pay.md": f"---\n{front}---\n{PAY}"})
    assert [(s.path, why in s.reason) for s in report.skipped] == [("pay.md", True)]


def test_unclosed_front_matter_naming_groups_skips_the_page(tmp_path: Path) -> None:
    report, _ = index(tmp_path, {"pay.md": f"---\ngroups: [hr]\n{PAY}"})
    assert "no closing '---'" in report.skipped[0].reason


@pytest.mark.parametrize(
    "meta",
    [
        '<meta name="groups" content="">',
        '<meta name="groups" content="hr"><meta name="groups" content="ops">',
        '<meta name="group" content="hr">',
    ],
)
def test_odd_html_groups_skip_the_page(tmp_path: Path, meta: str) -> None:
    page = f"<html><head>{meta}<title>Pay</title></head><body><p>Band C.</p></body></html>"
    report, _ = index(tmp_path, {"pay.html": page})
    assert [s.path for s in report.skipped] == ["pay.html"]


def test_a_repeated_groups_key_skips_a_corpus_record(tmp_path: Path) -> None:
    lines = [
        '{"_id": "p1", "text": "Band C pay.", "groups": ["hr"], "groups": []}',
        '{"_id": "p2", "text": "Open day."}',
    ]
    report, _ = index(tmp_path, {"corpus.jsonl": "\n".join(lines) + "\n"})
    assert [(s.path, "repeats the key" in s.reason) for s in report.skipped] == [
        ("corpus.jsonl:1", True)
    ]


def test_a_push_with_malformed_front_matter_is_a_422_with_the_reason(api) -> None:
    r = put(api, "pushed/pay.md", MALFORMED)
    assert r.status_code == 422 and "not valid YAML" in r.json()["detail"]
    assert not readers_see(api, "pushed/pay.md")


def test_warnings_reach_the_run_report_and_the_push_response(tmp_path: Path, api) -> None:
    latin1 = "# Café\n\nCrème brûlée recipe.\n".encode("latin-1")
    report, _ = index(tmp_path, {"cafe.md": latin1})
    assert "warning cafe.md: invalid UTF-8 replaced with U+FFFD" in report.text().splitlines()
    assert report.to_json()["warnings"] == [
        {"path": "cafe.md", "warning": "invalid UTF-8 replaced with U+FFFD"}
    ]
    r = api.client.put(
        "/documents/pushed/cafe.md",
        files={"file": ("cafe.md", latin1, "text/markdown")},
        headers=api.auth("w"),
    )
    assert r.status_code == 200 and r.json()["warnings"] == ["invalid UTF-8 replaced with U+FFFD"]


def test_a_misspelt_or_blank_groups_form_field_is_a_422(api) -> None:
    for form in ({"group": "hr"}, {"groups": " "}):
        r = api.client.put(
            "/documents/pushed/form.md",
            files={"file": ("form.md", PAY.encode(), "text/markdown")},
            data=form,
            headers=api.auth("w"),
        )
        assert r.status_code == 422, (form, r.text)
    assert not readers_see(api, "pushed/form.md")


# -- finding 5: front matter that expands without bound ---------------------------------------


def test_yaml_aliases_are_refused_in_folder_runs(tmp_path: Path) -> None:
    page = f"---\n{LAUGHS}---\n{PAY}"
    assert len(page) < 600
    report, _ = index(tmp_path, {"laughs.md": page, "loop.md": f"---\na: &a [*a]\n---\n{PAY}"})
    reasons = {s.path: s.reason for s in report.skipped}
    assert set(reasons) == {"laughs.md", "loop.md"}
    assert all("anchor or alias" in r for r in reasons.values())


def test_yaml_aliases_and_big_metadata_are_422s_on_push(api) -> None:
    for text in (f"---\n{LAUGHS}---\n{PAY}", f"---\na: &a [*a]\n---\n{PAY}"):
        r = put(api, "pushed/laughs.md", text)
        assert r.status_code == 422 and "anchor or alias" in r.json()["detail"]
    big = "---\nnotes: [" + ", ".join(["word"] * 20000) + "]\n---\n" + PAY
    r = put(api, "pushed/big.md", big)
    assert r.status_code == 422 and "max_metadata_bytes" in r.json()["detail"]


def test_metadata_over_the_cap_is_skipped_with_the_setting_named(tmp_path: Path) -> None:
    record = {"_id": "r1", "text": "Short.", "metadata": {"blob": "x" * 3000}}
    report, _ = index(
        tmp_path,
        {
            "c.jsonl": json.dumps(record) + "\n",
            "p.md": "---\nnote: " + "y" * 3000 + "\n---\n# P\n\nT.\n",
        },
        max_metadata_bytes=2048,
    )
    reasons = {s.path: s.reason for s in report.skipped}
    assert set(reasons) == {"c.jsonl:1", "p.md"}
    assert all("max_metadata_bytes" in r for r in reasons.values())


# -- finding 11: ids that differ from a restricted one by case or compatibility forms --------


def test_case_and_fullwidth_ids_fall_under_folder_rules(tmp_path: Path) -> None:
    rules = tmp_path / "rules.yaml"
    rules.write_text(RULES)
    pages = {"hr/pay.md": PAY, "HR/pay.md": PAY, "ｈｒ/pay.md": PAY}
    report, index_dir = index(tmp_path, pages, access_rules=rules)
    assert sorted(report.added) == sorted(pages)
    assert groups_of(index_dir) == {doc_id: ["hr"] for doc_id in pages}


def test_case_and_fullwidth_ids_fall_under_folder_rules_on_push(api) -> None:
    for doc_id in ("HR/pushed.md", "ｈｒ/pushed.md", "Hr/pushed.md"):
        assert put(api, doc_id, PAY, key="hr-w").status_code == 200
        assert not readers_see(api, doc_id), doc_id
        assert api.client.get(f"/documents/{doc_id}", headers=api.auth("hr")).status_code == 200


# -- finding 11: an error-level log line carries no raw document path ------------------------


def test_the_500_log_line_names_the_route_not_the_document_path(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    from sounding.service.settings import ServiceSettings

    app: FastAPI = create_app(
        ServiceSettings(index_dir=tmp_path / "none", require_keys=False),
        embedder=HashingEmbedder(16),
    )

    @app.get("/test-only-boom/{document_id:path}")
    def boom(document_id: str) -> None:
        raise RuntimeError("a bug")

    with (
        TestClient(app, raise_server_exceptions=False, client=("127.0.0.1", 1)) as client,
        caplog.at_level(logging.ERROR, logger="sounding"),
    ):
        assert client.get("/test-only-boom/hr/salary-bands.md").status_code == 500
    lines = [r.getMessage() for r in caplog.records if r.levelno >= logging.ERROR]
    assert lines and not any("salary-bands" in line for line in lines)
    assert any("/test-only-boom/{document_id}" in line for line in lines)
